"""The draw ledger as arrays: one difference-estimator term per draw, for one scope.

For draw m in scope D (N_D = scope_size items) the term is

    a_m = (1/N_D) [ sum_{t<m, i_t in D} L_{i_t}            (losses of earlier draws)
                    + sum_{j in U_m cap D} h_m(j)           (remaining_expected_loss)
                    + late_expected_loss_m                  (items of D absent at draw m)
                    + 1[i_m in D] (L_{i_m} - h_m(i_m)) / q_m(i_m) ]

With no late items E[a_m | draws before m] is the scope risk exactly, for any adaptive
proposal q_m and any predictable control variate h_m (the difference estimator of
"Model Assisted Survey Sampling", 1992, with Horvitz-Thompson weighting of one draw from
U_m; "On Statistical Bias in Active Learning", ICLR 2021, is the g = 0 case). The service
fills ``DrawTerms`` per scope; this module turns it into per-draw sums.

Unknown losses (PENDING, SKIPPED) are filled with a chosen value per draw: the draw-time
prediction h for point estimates, 0 for lower bounds and B for upper bounds.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np

from ._checks import check_finite_array, describe

__all__ = [
    "DRAW_LABELED",
    "DRAW_PENDING",
    "DRAW_SKIPPED",
    "DrawTerms",
    "PlugInSums",
    "TermSums",
    "check_terms",
    "term_sums",
]

DRAW_LABELED, DRAW_PENDING, DRAW_SKIPPED = 0, 1, 2


@dataclass(frozen=True)
class DrawTerms:
    """One entry per draw, in draw order, for ONE scope D (arrays of length M).

    ``expected_loss`` is h_m(i_m), the control variate fixed before draw m (a surrogate
    fitted on earlier labels only); ``remaining_expected_loss`` is the sum of h_m over
    U_m cap D (drawn item included if in D); ``late_expected_loss`` / ``late_count`` cover
    the items of D absent at draw m (a label-free score, e.g. the cold-start surrogate);
    ``correction_low`` / ``correction_high`` are the predictable range of (L - h) / q over
    U_m from ``DrawBatch``. ``residual_second_moment`` (optional) is the draw-time
    predicted E[(L - h)^2] at the drawn item, used by the model-based variance; when
    absent the bound h (B - h) on it is used instead. ``remaining_count`` (optional) is
    |U_m|, the number of candidates draw m chose from (drawn item included); with it the
    terms are combined with finite-population weights (``estimators``), without it with
    equal weights.
    """

    probability: np.ndarray
    expected_loss: np.ndarray
    remaining_expected_loss: np.ndarray
    late_expected_loss: np.ndarray
    late_count: np.ndarray
    in_scope: np.ndarray
    status: np.ndarray
    loss: np.ndarray
    correction_low: np.ndarray
    correction_high: np.ndarray
    residual_second_moment: np.ndarray | None = None
    remaining_count: np.ndarray | None = None

    @property
    def count(self) -> int:
        return int(np.asarray(self.probability).shape[0])

    def first(self, count: int) -> DrawTerms:
        """The terms of the first ``count`` draws (the ledger as it stood after them)."""
        cut: dict[str, Any] = {}
        for field in fields(self):
            value = getattr(self, field.name)
            cut[field.name] = None if value is None else value[:count]
        return replace(self, **cut)


@dataclass(frozen=True)
class PlugInSums:
    """The current surrogate over scope D (draws not yet labeled count as unlabeled).

    ``unlabeled_count`` (optional): how many items of D have no label; 0 means D is fully
    labeled (a census), and every estimate is then the exact mean of its losses.
    """

    scope_size: int
    labeled_loss_sum: float
    unlabeled_expected_loss_sum: float
    unlabeled_second_moment_sum: float
    unlabeled_count: int | None = None


@dataclass(frozen=True)
class TermSums:
    """Validated per-draw arrays in sum units (multiply by 1/N_D for risk units)."""

    probability: np.ndarray
    expected_loss: np.ndarray
    remaining: np.ndarray
    late_expected: np.ndarray
    late_count: np.ndarray
    in_scope: np.ndarray
    status: np.ndarray
    loss: np.ndarray
    low: np.ndarray
    high: np.ndarray
    second_moment: np.ndarray
    remaining_count: np.ndarray | None = None

    @property
    def count(self) -> int:
        return int(self.probability.shape[0])

    @property
    def labeled(self) -> np.ndarray:
        return np.asarray(self.status == DRAW_LABELED)


def check_terms(terms: DrawTerms, *, loss_bound: float) -> TermSums:
    """Validate a ``DrawTerms`` (ValueError naming field, value and rule)."""
    bound = float(loss_bound)
    if not (np.isfinite(bound) and bound > 0.0):
        raise ValueError(f"loss_bound = {describe(loss_bound)}: must be finite and > 0.")
    probability = check_finite_array("probability", terms.probability, ndim=1)
    m = probability.shape[0]
    fields = {}
    for name in (
        "expected_loss",
        "remaining_expected_loss",
        "late_expected_loss",
        "late_count",
        "correction_low",
        "correction_high",
    ):
        array = check_finite_array(name, getattr(terms, name), ndim=1)
        if array.shape[0] != m:
            raise ValueError(f"{name} has {array.shape[0]} entries: must match probability ({m}).")
        fields[name] = array
    in_scope = np.asarray(terms.in_scope)
    status = np.asarray(terms.status)
    loss = np.asarray(terms.loss, dtype=np.float64)
    for name, array in (("in_scope", in_scope), ("status", status), ("loss", loss)):
        if array.ndim != 1 or array.shape[0] != m:
            raise ValueError(f"{name} has shape {array.shape}: must be ({m},) like probability.")
    if m and (probability.min() <= 0.0 or probability.max() > 1.0):
        i = int(np.argmin(probability) if probability.min() <= 0.0 else np.argmax(probability))
        raise ValueError(f"probability[{i}] = {describe(probability[i])}: must be in (0, 1].")
    if not np.all(np.isin(status, (DRAW_LABELED, DRAW_PENDING, DRAW_SKIPPED))):
        i = int(np.flatnonzero(~np.isin(status, (DRAW_LABELED, DRAW_PENDING, DRAW_SKIPPED)))[0])
        raise ValueError(
            f"status[{i}] = {describe(status[i])}: must be DRAW_LABELED (0), DRAW_PENDING (1) or "
            "DRAW_SKIPPED (2)."
        )
    status = status.astype(np.int64)
    labeled = status == DRAW_LABELED
    tolerance = 1e-9 * bound
    with np.errstate(invalid="ignore"):
        bad_loss = labeled & ~(
            np.isfinite(loss) & (loss >= -tolerance) & (loss <= bound + tolerance)
        )
    if np.any(bad_loss):
        i = int(np.flatnonzero(bad_loss)[0])
        raise ValueError(
            f"loss[{i}] = {describe(loss[i])}:"
            f" must be finite and in [0, {describe(bound)}] for a LABELED draw."
        )
    h = fields["expected_loss"]
    if m and (h.min() < -tolerance or h.max() > bound + tolerance):
        i = int(np.argmax((h < -tolerance) | (h > bound + tolerance)))
        raise ValueError(
            f"expected_loss[{i}] = {describe(h[i])}: must be in [0, {describe(bound)}]."
        )
    late_count = fields["late_count"]
    if m and (late_count.min() < 0 or np.any(late_count != np.round(late_count))):
        i = int(np.argmax((late_count < 0) | (late_count != np.round(late_count))))
        raise ValueError(f"late_count[{i}] = {describe(late_count[i])}: must be an integer >= 0.")
    for name in ("remaining_expected_loss", "late_expected_loss"):
        if m and fields[name].min() < -tolerance * max(1.0, float(np.abs(fields[name]).max())):
            i = int(np.argmin(fields[name]))
            raise ValueError(f"{name}[{i}] = {describe(fields[name][i])}: must be >= 0.")
    if m and (fields["correction_low"].max() > 0.0 or fields["correction_high"].min() < 0.0):
        raise ValueError(
            "correction_low must be <= 0 and correction_high >= 0 for every draw "
            f"(got max low {describe(fields['correction_low'].max())}, min high "
            f"{describe(fields['correction_high'].min())})."
        )
    h = np.clip(h, 0.0, bound)
    if terms.residual_second_moment is not None:
        second = check_finite_array("residual_second_moment", terms.residual_second_moment, ndim=1)
        if second.shape[0] != m:
            raise ValueError(
                f"residual_second_moment has {second.shape[0]} entries: must match "
                f"probability ({m})."
            )
        second = np.maximum(second, 0.0)
    else:
        # Any loss in [0, B] with mean h has variance at most h (B - h) (Bhatia-Davis).
        second = h * (bound - h)
    remaining_count = None
    if terms.remaining_count is not None:
        remaining_count = check_finite_array("remaining_count", terms.remaining_count, ndim=1)
        if remaining_count.shape[0] != m:
            raise ValueError(
                f"remaining_count has {remaining_count.shape[0]} entries: must match "
                f"probability ({m})."
            )
        bad = (remaining_count < 1) | (remaining_count != np.round(remaining_count))
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"remaining_count[{i}] = {describe(remaining_count[i])}: must be an integer >= 1."
            )
    return TermSums(
        probability=probability,
        expected_loss=h,
        remaining=fields["remaining_expected_loss"],
        late_expected=fields["late_expected_loss"],
        late_count=late_count,
        in_scope=in_scope.astype(bool),
        status=status,
        loss=np.where(labeled, np.clip(np.nan_to_num(loss), 0.0, bound), np.nan),
        low=fields["correction_low"],
        high=fields["correction_high"],
        second_moment=second,
        remaining_count=remaining_count,
    )


def term_sums(
    sums: TermSums, fill: np.ndarray, *, late: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """(known_m, correction_m) in sum units, unknown losses replaced by ``fill``.

    known_m = sum of earlier in-scope losses + remaining_m + late_m (``late`` chooses how
    absent items enter: their score, 0, or late_count * B); correction_m is
    1[i_m in D] (L - h) / q. The term is (known_m + correction_m) / N_D.
    """
    losses = np.where(sums.labeled, sums.loss, fill)
    scoped = np.where(sums.in_scope, losses, 0.0)
    earlier = np.concatenate([[0.0], np.cumsum(scoped)[:-1]]) if sums.count else np.zeros(0)
    known = earlier + sums.remaining + late
    correction = np.where(sums.in_scope, (losses - sums.expected_loss) / sums.probability, 0.0)
    return known, correction
