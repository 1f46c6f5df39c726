"""The draw ledger: how the next draws are made, what each draw logs, and the core's
inputs built from the log.

One path from a pool's scores to the estimator's terms, used by the engine, the label
benchmark (``benchmarks/harness.py``), the system benchmark and the test simulator, so a
benchmark measures the service's own code:

1. :func:`select` makes the next k draws over the candidates: the reliance guard's control
   variate h and floor (``Reliance``, chosen at the last refit), the hedged usefulness
   (or an experiment's rule), ``draw_batch`` with each item's own reach |L - h|;
2. :meth:`DrawLedger.record` logs them as :class:`DrawRecord` rows (the store's format);
   :meth:`DrawLedger.label`, :meth:`DrawLedger.skip` and the lease updates record outcomes;
3. :meth:`DrawLedger.terms` builds ``DrawTerms`` for the whole pool or a scope, and
   :meth:`DrawLedger.plug_in_sums` the plug-in's ``PlugInSums``.

The server draws through the core's ``DrawIndex`` instead of :func:`select`'s
whole-candidate pass: :func:`build_index` applies the same control variate, usefulness and
reach once per refit (its state lives with the scores in ``PoolData``), :func:`index_rows`
adds items ingested between refits, and :func:`select_from` makes the draws in
O(k log N). Both paths give the same draws on the same seed (tests/core/test_draw_index.py,
tests/service/test_indexed_draws.py); the index's correction ranges are conservative
(docs/estimation.md). The full passes of :meth:`DrawLedger.terms` and
:meth:`DrawLedger.plug_in_sums` serve event-time windows and stand as the reference for
the whole pool and segments, whose estimates take their item sums from the pool's running
sums (:mod:`leadline.service.engine.sums`) through :meth:`DrawLedger.logged_terms`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from leadline.service.draws import DrawRecord, DrawStatus
from leadline.service.engine.columns import Column
from leadline.service.estimation import (
    DRAW_LABELED,
    DRAW_PENDING,
    DRAW_SKIPPED,
    DrawBatch,
    DrawIndex,
    DrawTerms,
    PlugInSums,
    Reliance,
    SurrogateScores,
    draw_batch,
    usefulness,
)

__all__ = [
    "CORE_STATUS",
    "DrawLedger",
    "Selection",
    "UsefulnessRule",
    "build_index",
    "core_status",
    "index_rows",
    "select",
    "select_from",
]

#: Each draw status as the core's terms know it: outcome unknown (PENDING), LABELED, SKIPPED.
CORE_STATUS: dict[DrawStatus, int] = {
    DrawStatus.ASSIGNED: DRAW_PENDING,
    DrawStatus.LABELED: DRAW_LABELED,
    DrawStatus.SKIPPED: DRAW_SKIPPED,
    DrawStatus.WAITING: DRAW_PENDING,
}
_CORE_TABLE = np.full(max(DrawStatus) + 1, DRAW_PENDING, dtype=np.int64)
for _status, _code in CORE_STATUS.items():
    _CORE_TABLE[_status] = _code

#: (the candidates' scores as seen through the control variate h) -> usefulness >= 0.
UsefulnessRule = Callable[[SurrogateScores], np.ndarray]


def core_status(status: np.ndarray) -> np.ndarray:
    """The core's ``DRAW_*`` codes of an array of :class:`DrawStatus` numbers."""
    return _CORE_TABLE[np.asarray(status, dtype=np.int64)]


@dataclass(frozen=True)
class Selection:
    """The next draws: the core's ``DrawBatch`` over the candidates, with the control
    variate h and its predicted E[(L - h)^2] at each drawn candidate."""

    batch: DrawBatch
    expected_loss: np.ndarray
    second_moment: np.ndarray

    @property
    def positions(self) -> np.ndarray:
        return self.batch.positions


def select(
    scores: SurrogateScores,
    count: int,
    *,
    reliance: Reliance,
    loss_bound: float,
    rng: np.random.Generator,
    groups: np.ndarray | None = None,
    num_groups: int = 0,
    rule: UsefulnessRule | None = None,
) -> Selection:
    """``count`` sequential draws without replacement from the candidates ``scores``
    describe (the current surrogate over them, in candidate order).

    The surrogate's g is seen through the reliance guard's control variate
    (``Reliance.apply``); the usefulness is the core's hedged rule (``rule`` replaces it
    in experiments); the floor is the reliance's. Each candidate's own reach |L - h|
    narrows the anytime bound's per-draw ranges.
    """
    seen = reliance.apply(scores, loss_bound=loss_bound)
    useful = usefulness(seen, loss_bound=loss_bound) if rule is None else rule(seen)
    worst = seen.worst_squared_deviation
    batch = draw_batch(
        useful,
        seen.expected_loss,
        count,
        floor=reliance.floor,
        loss_bound=loss_bound,
        rng=rng,
        groups=groups,
        num_groups=num_groups,
        max_deviation=None if worst is None else np.sqrt(worst),
    )
    return Selection(
        batch=batch,
        expected_loss=seen.expected_loss[batch.positions],
        second_moment=seen.residual_second_moment[batch.positions],
    )


def _draw_weights(
    scores: SurrogateScores,
    *,
    reliance: Reliance,
    loss_bound: float,
    rule: UsefulnessRule | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """(u, h, reach bound) of items as :func:`select` sees them: elementwise, so a subset of
    rows gets exactly the values the whole pool would."""
    seen = reliance.apply(scores, loss_bound=loss_bound)
    useful = usefulness(seen, loss_bound=loss_bound) if rule is None else rule(seen)
    worst = seen.worst_squared_deviation
    return useful, seen.expected_loss, None if worst is None else np.sqrt(worst)


def build_index(
    scores: SurrogateScores,
    *,
    reliance: Reliance,
    loss_bound: float,
    present: np.ndarray | None = None,
    groups: np.ndarray | None = None,
    num_groups: int = 0,
    rule: UsefulnessRule | None = None,
) -> DrawIndex:
    """The core's ``DrawIndex`` over rows 0..n-1 of ``scores`` (the current surrogate's),
    ``present`` marking the candidates: the same h, usefulness and reach as
    :func:`select` (O(n); once per refit)."""
    useful, expected, reach = _draw_weights(
        scores, reliance=reliance, loss_bound=loss_bound, rule=rule
    )
    return DrawIndex.build(
        useful,
        expected,
        loss_bound=loss_bound,
        present=present,
        groups=groups,
        num_groups=num_groups,
        max_deviation=reach,
        floor=reliance.floor,
    )


def index_rows(
    index: DrawIndex,
    rows: np.ndarray,
    scores: SurrogateScores,
    *,
    reliance: Reliance,
    loss_bound: float,
    groups: np.ndarray | None = None,
) -> None:
    """New candidates ``rows`` with their ``scores`` (the surrogate in force) join
    ``index`` (O(r log N))."""
    useful, expected, reach = _draw_weights(scores, reliance=reliance, loss_bound=loss_bound)
    index.add(rows, useful, expected, groups=groups, max_deviation=reach)


def select_from(
    index: DrawIndex,
    count: int,
    *,
    reliance: Reliance,
    loss_bound: float,
    rng: np.random.Generator,
    scores_at: Callable[[np.ndarray], SurrogateScores],
) -> Selection:
    """``count`` draws from ``index`` (built with ``reliance``'s control variate) at
    ``reliance.floor``: the drawn rows leave the index. ``DrawBatch.positions`` are pool
    rows; ``scores_at(rows)`` gives the current surrogate's scores of those rows (for the
    logged h and E[(L - h)^2]). O(count log N)."""
    batch = index.draw(count, floor=reliance.floor, rng=rng)
    seen = reliance.apply(scores_at(batch.positions), loss_bound=loss_bound)
    return Selection(
        batch=batch,
        expected_loss=seen.expected_loss,
        second_moment=seen.residual_second_moment,
    )


def _suffix_at(values: np.ndarray, marks: np.ndarray) -> np.ndarray:
    """sum(values[mark:]) for each mark (0 at mark == len(values))."""
    suffix = np.zeros(values.shape[0] + 1, dtype=np.float64)
    suffix[:-1] = np.cumsum(values[::-1])[::-1]
    return np.asarray(suffix[marks])


# The ledger's numeric columns (named as DrawRecord's fields), their dtypes and fills.
_NUMBERS: dict[str, tuple[type, float]] = {
    "row": (np.int64, 0),
    "probability": (np.float64, 0),
    "remaining_count": (np.int64, 0),
    "remaining_expected_loss": (np.float64, 0),
    "correction_low": (np.float64, 0),
    "correction_high": (np.float64, 0),
    "min_probability": (np.float64, 0),
    "expected_loss": (np.float64, 0),
    "second_moment": (np.float64, 0),
    "surrogate_version": (np.int64, 0),
    "arrival_mark": (np.int64, 0),
    "draw_time_ms": (np.int64, 0),
    "status": (np.int8, 0),
    "lease_expire_ms": (np.int64, 0),
    "label": (np.float64, np.nan),
    "loss": (np.float64, np.nan),
    "label_time_ms": (np.int64, 0),
}
_TEXTS = ("labeler", "holder", "assignment_id", "skip_reason")


class DrawLedger:
    """A pool's draws in draw order, as columns named after :class:`DrawRecord`'s fields:
    what was logged at draw time plus the lease and the outcome (an unknown label or
    loss is NaN). Mutated only under the owner's lock."""

    row: Column
    probability: Column
    remaining_count: Column
    remaining_expected_loss: Column
    correction_low: Column
    correction_high: Column
    min_probability: Column
    expected_loss: Column
    second_moment: Column
    surrogate_version: Column
    arrival_mark: Column
    draw_time_ms: Column
    status: Column
    lease_expire_ms: Column
    label: Column
    loss: Column
    label_time_ms: Column
    labeler: list[str]
    holder: list[str]
    assignment_id: list[str]
    skip_reason: list[str]

    def __init__(self) -> None:
        for name, (dtype, _) in _NUMBERS.items():
            setattr(self, name, Column(dtype))
        for name in _TEXTS:
            setattr(self, name, [])
        self.remaining_by_segment: list[np.ndarray] = []
        self._remaining_of_segment: dict[int, Column] = {}

    def __len__(self) -> int:
        return self.row.size

    # -- writing -------------------------------------------------------------------------
    def record(
        self,
        selection: Selection,
        *,
        rows: np.ndarray,
        surrogate_version: int,
        arrival_mark: int,
        draw_time_ms: int = 0,
        labeler: str = "",
        holder: str = "",
        lease_expire_ms: int = 0,
        assignment_id: Callable[[int], str] | None = None,
    ) -> list[DrawRecord]:
        """Log the selection's draws of pool ``rows`` (ASSIGNED to ``labeler``); returns
        the new records (for the store). ``assignment_id(draw_index)`` names each."""
        batch = selection.batch
        by_group = batch.remaining_expected_loss_by_group
        start = len(self)
        records = [
            DrawRecord(
                draw_index=start + j,
                row=int(rows[j]),
                # The last remaining item's probability can exceed 1 by rounding
                # (1 + 1e-14); the core's term check wants (0, 1].
                probability=min(float(batch.probabilities[j]), 1.0),
                remaining_count=int(batch.remaining_counts[j]),
                remaining_expected_loss=float(batch.remaining_expected_loss[j]),
                remaining_by_segment=(
                    np.zeros(0) if by_group is None else np.asarray(by_group[j], np.float64)
                ),
                correction_low=float(batch.correction_low[j]),
                correction_high=float(batch.correction_high[j]),
                min_probability=min(float(batch.min_probability[j]), 1.0),
                expected_loss=float(selection.expected_loss[j]),
                second_moment=float(selection.second_moment[j]),
                surrogate_version=surrogate_version,
                arrival_mark=arrival_mark,
                draw_time_ms=draw_time_ms,
                labeler=labeler,
                holder=holder,
                assignment_id="" if assignment_id is None else assignment_id(start + j),
                lease_expire_ms=lease_expire_ms,
            )
            for j in range(batch.positions.shape[0])
        ]
        self.append(records)
        return records

    def append(self, records: Sequence[DrawRecord]) -> None:
        """Append records in draw order (new draws, or the store's rows at start-up)."""
        for name, (_, fill) in _NUMBERS.items():
            values = [getattr(r, name) for r in records]
            column: Column = getattr(self, name)
            column.extend(np.array([fill if v is None else v for v in values]))
        for name in _TEXTS:
            getattr(self, name).extend(getattr(r, name) for r in records)
        self.remaining_by_segment.extend(r.remaining_by_segment for r in records)

    def set_labels(
        self, indices: np.ndarray, labels: np.ndarray, losses: np.ndarray, *, time_ms: int = 0
    ) -> None:
        """Draws ``indices`` got ``labels`` with ``losses``: LABELED."""
        self.status.view[indices] = DrawStatus.LABELED
        self.label.view[indices] = labels
        self.loss.view[indices] = losses
        self.label_time_ms.view[indices] = time_ms

    def skip(self, index: int, reason: str, *, time_ms: int) -> None:
        """Draw ``index`` cannot be labeled (``reason``): SKIPPED."""
        self.status.view[index] = DrawStatus.SKIPPED
        self.skip_reason[index] = reason
        self.label_time_ms.view[index] = time_ms

    def assign(
        self, index: int, *, labeler: str, holder: str, assignment_id: str, lease_expire_ms: int
    ) -> None:
        """Draw ``index`` is offered again: ASSIGNED to ``labeler`` under a new id."""
        self.status.view[index] = DrawStatus.ASSIGNED
        self.labeler[index] = labeler
        self.holder[index] = holder
        self.assignment_id[index] = assignment_id
        self.lease_expire_ms.view[index] = lease_expire_ms

    def release(self, index: int, *, time_ms: int) -> None:
        """Draw ``index`` was given back: WAITING; its lease ends at ``time_ms``."""
        self.status.view[index] = DrawStatus.WAITING
        self.lease_expire_ms.view[index] = min(int(self.lease_expire_ms.view[index]), time_ms)

    # -- reading -------------------------------------------------------------------------
    def at(self, index: int) -> DrawRecord:
        """Draw ``index`` as a record (the store's row format)."""
        values: dict[str, Any] = {name: getattr(self, name)[index] for name in _TEXTS}
        for name, (dtype, _) in _NUMBERS.items():
            value = getattr(self, name).view[index]
            values[name] = (
                None if np.isnan(value) else float(value) if dtype is np.float64 else int(value)
            )
        values["status"] = DrawStatus(values["status"])
        return DrawRecord(
            draw_index=index, remaining_by_segment=self.remaining_by_segment[index], **values
        )

    def counts(self) -> tuple[int, int, int]:
        """(labeled, pending, skipped) draws."""
        status = self.status.view
        labeled = int(np.count_nonzero(status == DrawStatus.LABELED))
        skipped = int(np.count_nonzero(status == DrawStatus.SKIPPED))
        return labeled, len(status) - labeled - skipped, skipped

    @property
    def labeled(self) -> np.ndarray:
        """Indices of the LABELED draws."""
        return np.flatnonzero(self.status.view == DrawStatus.LABELED)

    # -- the core's inputs ---------------------------------------------------------------
    def terms(
        self,
        *,
        item_count: int,
        cold_expected_loss: np.ndarray,
        loss_bound: float,
        scope: np.ndarray | None = None,
        segment: int = -1,
        window: bool = False,
    ) -> DrawTerms:
        """``DrawTerms`` of every draw for the whole pool (``scope`` None) or for the items
        where ``scope`` (bool over the pool's rows) is True (docs/core-api.md, ``DrawTerms``).

        * whole pool and ``segment`` (a segment code): the control variate h_m is the
          draw-time one, and the sums over the remaining items U_m were logged when the
          draw was made (whole pool and per segment), as were the correction range and the
          probability;
        * ``window`` (a scope cut by event time): the logged sums do not split by event
          time, so every term uses the label-free cold-start score g0 as its control
          variate. g0 never depends on labels, so it is predictable and the difference
          estimator stays exactly unbiased; the sum of g0 over U_m and the scope comes
          from prefix sums in arrival order (items present at draw m are the rows below
          its arrival mark, minus the items drawn before m), and the correction range is
          the conservative [-B / min q_m, B / min q_m].

        ``item_count`` and ``cold_expected_loss`` (g0 per item) describe the pool now:
        ``late_*`` count the in-scope items that arrived after draw m, with their g0.
        Everything is numpy over the columns: no per-item Python loop.
        """
        n = item_count
        m = len(self)
        rows = self.row.view
        marks = self.arrival_mark.view
        g0 = cold_expected_loss
        if scope is None:
            in_scope = np.ones(m, dtype=bool)
            weighted = g0
            late_count = (n - marks).astype(np.float64)
        else:
            in_scope = scope[rows]
            weighted = np.where(scope, g0, 0.0)
            late_count = _suffix_at(scope.astype(np.float64), marks)
        # Suffix sums give exactly 0 where no item came later and never go negative (a total
        # minus a prefix can, by rounding, and the core refuses negative sums).
        late_g0 = _suffix_at(weighted, marks)
        second_moment: np.ndarray | None
        if window:
            expected = g0[rows]
            drawn_in_scope = np.where(in_scope, expected, 0.0)
            drawn_before = np.cumsum(drawn_in_scope) - drawn_in_scope
            present_g0 = np.cumsum(weighted)[marks - 1] if m else np.zeros(0)
            remaining = np.maximum(present_g0 - drawn_before, 0.0)
            min_q = self.min_probability.view
            correction_low = -loss_bound / min_q
            correction_high = loss_bound / min_q
            # g0's residual second moment at the drawn items is not logged; the core then
            # uses its bound h (B - h).
            second_moment = None
        else:
            expected = self.expected_loss.view.copy()
            correction_low = self.correction_low.view.copy()
            correction_high = self.correction_high.view.copy()
            second_moment = self.second_moment.view.copy()
            remaining = self._logged_remaining(segment)
        return self._draw_terms(
            expected=expected,
            remaining=remaining,
            late_count=late_count,
            late_expected_loss=late_g0,
            in_scope=in_scope,
            correction_low=correction_low,
            correction_high=correction_high,
            second_moment=second_moment,
        )

    def logged_terms(
        self,
        *,
        in_scope: np.ndarray | None,
        late_count: np.ndarray,
        late_expected_loss: np.ndarray,
        segment: int = -1,
    ) -> DrawTerms:
        """``DrawTerms`` of the whole pool or of ``segment`` from what each draw logged,
        given the scope's late terms (:class:`~leadline.service.engine.sums.RunningSums`
        keeps them without a pass over the items): the same terms as :meth:`terms`
        (``window`` False) up to the rounding of the late sums. ``in_scope`` None: every
        draw is in scope."""
        return self._draw_terms(
            expected=self.expected_loss.view.copy(),
            remaining=self._logged_remaining(segment),
            late_count=late_count,
            late_expected_loss=late_expected_loss,
            in_scope=np.ones(len(self), dtype=bool) if in_scope is None else in_scope,
            correction_low=self.correction_low.view.copy(),
            correction_high=self.correction_high.view.copy(),
            second_moment=self.second_moment.view.copy(),
        )

    def _logged_remaining(self, segment: int) -> np.ndarray:
        """The remaining items' summed control variate logged at each draw (whole pool,
        or ``segment``'s share)."""
        if segment < 0:
            return self.remaining_expected_loss.view.copy()
        # What a draw logged never changes: each segment's column is read from the
        # per-draw arrays once, then only for draws made since.
        column = self._remaining_of_segment.setdefault(segment, Column(np.float64))
        if column.size < len(self):
            column.extend(
                np.array(
                    [
                        float(sums[segment]) if segment < sums.shape[0] else 0.0
                        for sums in self.remaining_by_segment[column.size :]
                    ],
                    dtype=np.float64,
                )
            )
        return column.view.copy()

    def _draw_terms(
        self,
        *,
        expected: np.ndarray,
        remaining: np.ndarray,
        late_count: np.ndarray,
        late_expected_loss: np.ndarray,
        in_scope: np.ndarray,
        correction_low: np.ndarray,
        correction_high: np.ndarray,
        second_moment: np.ndarray | None,
    ) -> DrawTerms:
        labeled = self.status.view == DrawStatus.LABELED
        return DrawTerms(
            probability=self.probability.view.copy(),
            expected_loss=np.asarray(expected, dtype=np.float64),
            remaining_expected_loss=np.asarray(remaining, dtype=np.float64),
            late_expected_loss=np.asarray(late_expected_loss, dtype=np.float64),
            late_count=np.asarray(late_count, dtype=np.float64),
            in_scope=np.asarray(in_scope, dtype=bool),
            status=core_status(self.status.view),
            loss=np.where(labeled, self.loss.view, np.nan),
            correction_low=np.asarray(correction_low, dtype=np.float64),
            correction_high=np.asarray(correction_high, dtype=np.float64),
            residual_second_moment=second_moment,
            remaining_count=self.remaining_count.view.astype(np.float64),
        )

    def labeled_loss_sum(self, in_scope: np.ndarray | None = None) -> float:
        """The summed loss of the labeled draws (of those ``in_scope`` marks, bool over the
        draws)."""
        labeled = self.status.view == DrawStatus.LABELED
        if in_scope is not None:
            labeled &= in_scope
        return float(self.loss.view[labeled].sum())

    def plug_in_sums(
        self,
        *,
        unlabeled: np.ndarray,
        expected_loss: np.ndarray,
        second_moment: np.ndarray,
        scope: np.ndarray | None = None,
    ) -> PlugInSums:
        """The plug-in's sums over the scope: the labeled draws' losses, and the current
        surrogate's g and E[(L - g)^2] over the scope's items ``unlabeled`` marks (bool over
        the pool's rows). The plug-in uses g itself: the reliance guard shapes the draws'
        control variate, not the plug-in (a surrogate can be right on average yet a poor
        per-item guide)."""
        labeled = self.status.view == DrawStatus.LABELED
        if scope is None:
            size = int(unlabeled.shape[0])
            in_scope = labeled
            left = unlabeled
        else:
            size = int(np.count_nonzero(scope))
            in_scope = labeled & scope[self.row.view]
            left = unlabeled & scope
        return PlugInSums(
            scope_size=size,
            labeled_loss_sum=float(self.loss.view[in_scope].sum()),
            unlabeled_expected_loss_sum=float(expected_loss[left].sum()),
            unlabeled_second_moment_sum=float(second_moment[left].sum(dtype=np.float64)),
            unlabeled_count=int(np.count_nonzero(left)),
        )
