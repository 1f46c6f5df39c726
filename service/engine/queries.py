"""The read side of a pool: estimates and gates with their cache, the draw ledger page by
page, and the estimate trace.

Every answer is cached in the pool (``PoolState.cache``) under its inputs until the pool
changes (``PoolState.touch``): a polling gate costs one dictionary look-up between
changes. The scope's core inputs are cached the same way, so an estimate and a gate on the
same scope share them. Answers are computed outside the lock and cached only if the pool
did not change meanwhile.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TypeVar

import numpy as np

from leadline.service.draws import DrawStatus
from leadline.service.engine.gates import hint_within_scope
from leadline.service.engine.pool import PoolState
from leadline.service.engine.results import DrawInfo, EstimateResult, GateOutcome
from leadline.service.engine.scopes import Scope, ScopeInputs, build_scope_inputs
from leadline.service.estimation import (
    DRAW_LABELED,
    BoundKind,
    EstimatorMode,
    PlugInSums,
    check_gate,
    estimate_risk,
)

__all__ = ["draw_page", "estimate", "gate", "scope_inputs", "trace"]

_T = TypeVar("_T")


def scope_inputs(pool: PoolState, scope: Scope) -> ScopeInputs:
    """The scope's core inputs, cached until the pool changes (call with the lock held)."""
    key = ("inputs", scope)
    cached = pool.cache.get(key)
    if cached is None:
        cached = build_scope_inputs(pool, scope)
        pool.cache[key] = cached
    return cached


def _cached(
    pool: PoolState, key: tuple[object, ...], scope: Scope, answer: Callable[[ScopeInputs], _T]
) -> _T:
    """A read answered from the pool's cache, or computed outside the lock from the
    scope's inputs and cached unless the pool changed meanwhile."""
    with pool.lock:
        cached = pool.cache.get(key)
        if cached is not None:
            return cached  # type: ignore[no-any-return]
        inputs = scope_inputs(pool, scope)
        version = pool.state_version
    result = answer(inputs)
    with pool.lock:
        if pool.state_version == version:
            pool.cache[key] = result
    return result


def estimate(
    pool: PoolState, scope: Scope, *, mode: EstimatorMode, confidence: float
) -> EstimateResult:
    """The risk estimate for the scope in ``mode`` at ``confidence`` (cached)."""

    def answer(inputs: ScopeInputs) -> EstimateResult:
        return EstimateResult(
            estimate=estimate_risk(
                inputs.terms,
                inputs.sums,
                mode=mode,
                confidence=confidence,
                loss_bound=pool.loss_bound,
            ),
            items_in_scope=inputs.items_in_scope,
            items_unreached=inputs.items_unreached,
            surrogate_version=inputs.surrogate_version,
        )

    return _cached(pool, ("estimate", scope, mode, confidence), scope, answer)


def gate(
    pool: PoolState,
    scope: Scope,
    *,
    max_risk: float,
    confidence: float,
    bound: BoundKind,
    mode: EstimatorMode,
) -> GateOutcome:
    """The gate's verdict for the scope (cached), its labels hint capped at the scope's
    unlabeled items (:mod:`leadline.service.engine.gates`)."""

    def answer(inputs: ScopeInputs) -> GateOutcome:
        decision = check_gate(
            inputs.terms,
            inputs.sums,
            max_risk=max_risk,
            confidence=confidence,
            bound=bound,
            mode=mode,
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

    return _cached(pool, ("gate", scope, mode, confidence, bound, max_risk), scope, answer)


def draw_page(pool: PoolState, *, start: int, limit: int) -> tuple[list[DrawInfo], int]:
    """Draws ``start .. start + limit`` (call with ``pool.lock`` held); the second value
    is the next start, or 0 at the end."""
    data = pool.data
    draws = data.draws
    stop = min(len(draws), start + limit)
    infos = []
    for index in range(start, stop):
        row = int(draws.row.view[index])
        label = float(draws.label.view[index])
        loss = float(draws.loss.view[index])
        infos.append(
            DrawInfo(
                draw_index=index,
                item_id=data.item_ids[row],
                selection_probability=float(draws.probability.view[index]),
                surrogate_version=int(draws.surrogate_version.view[index]),
                expected_loss=float(draws.expected_loss.view[index]),
                status=DrawStatus(int(draws.status.view[index])),
                label=None if np.isnan(label) else label,
                loss=None if np.isnan(loss) else loss,
                labeler=draws.labeler[index],
                draw_time_ms=int(draws.draw_time_ms.view[index]),
                label_time_ms=int(draws.label_time_ms.view[index]),
                skip_reason=draws.skip_reason[index],
                segment=data.segment_names[int(data.segment.view[row])],
                remaining_count=int(draws.remaining_count.view[index]),
            )
        )
    return infos, (stop if stop < len(draws) else 0)


def trace(
    pool: PoolState,
    inputs: ScopeInputs,
    *,
    mode: EstimatorMode,
    confidence: float,
    max_points: int,
) -> list[EstimateResult]:
    """Estimates after the first k labeled draws for up to ``max_points`` values of k.

    Each point uses the draws up to the k-th labeled one, and for the plug-in part the
    current surrogate over the items not labeled by then (a progress view, not a replay
    of what was reported at the time). Reads ``pool`` arrays that never change in place
    for rows already drawn (draw rows, current scores are swapped whole).
    """
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
        prefix = terms.first(stop)
        later_labeled = in_scope_labeled.copy()
        later_labeled[:stop] = False
        # Items labeled after the prefix count as unlabeled at this point: their loss is
        # replaced by their current predicted loss in the plug-in sums.
        rows = pool.data.draws.row.view[: len(later_labeled)][later_labeled]
        sums = PlugInSums(
            scope_size=n_scope,
            labeled_loss_sum=float(np.nansum(terms.loss[:stop][terms.in_scope[:stop]])),
            unlabeled_expected_loss_sum=inputs.sums.unlabeled_expected_loss_sum
            + float(pool.data.expected_loss.view[rows].sum()),
            unlabeled_second_moment_sum=inputs.sums.unlabeled_second_moment_sum
            + float(pool.data.second_moment.view[rows].sum(dtype=np.float64)),
        )
        estimate = estimate_risk(
            prefix, sums, mode=mode, confidence=confidence, loss_bound=pool.loss_bound
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
