"""Read-side helpers: the draw ledger page by page, and the estimate trace."""

from __future__ import annotations

import numpy as np

from leadline.service.engine.pool import PoolState
from leadline.service.engine.results import DrawInfo, EstimateResult
from leadline.service.engine.scopes import ScopeInputs
from leadline.service.estimation import (
    DRAW_LABELED,
    EstimatorMode,
    PlugInSums,
    estimate_risk,
)

__all__ = ["draw_page", "trace"]


def draw_page(pool: PoolState, *, start: int, limit: int) -> tuple[list[DrawInfo], int]:
    """Draws ``start .. start + limit`` (call with ``pool.lock`` held); the second value
    is the next start, or 0 at the end."""
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
        rows = pool.draws.row.view[: len(later_labeled)][later_labeled]
        sums = PlugInSums(
            scope_size=n_scope,
            labeled_loss_sum=float(np.nansum(terms.loss[:stop][terms.in_scope[:stop]])),
            unlabeled_expected_loss_sum=inputs.sums.unlabeled_expected_loss_sum
            + float(pool.expected_loss.view[rows].sum()),
            unlabeled_second_moment_sum=inputs.sums.unlabeled_second_moment_sum
            + float(pool.second_moment.view[rows].sum()),
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
