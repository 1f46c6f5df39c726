"""Which unlabeled items to label next: usefulness scores and randomised draws.

Usefulness ("residual-spread rule"): u(j) = sqrt(E[(L_j - g_j)^2]), the surrogate's
predicted spread of the item's loss around its prediction. For the difference estimator
the variance-minimising proposal is proportional to exactly this quantity (the classical
optimal importance-sampling density |integrand| / normaliser, applied to the residual;
see "Model Assisted Survey Sampling", 1992, and "Safe and effective importance sampling",
JASA 2000, for defensive mixtures).

Hedge against an overconfident surrogate (``usefulness(scores, loss_bound=B)``): the
second moment is taken under a mixture that gives weight a = ``WORST_CASE_WEIGHT`` to the
worst case, u(j) = sqrt(E[(L_j - g_j)^2] + a W_j) with W_j = max (L_j - g_j)^2 over the
losses item j can take: ``scores.worst_squared_deviation`` (the item's own loss table)
when the surrogate computed it, else the bound form max(g_j, B - g_j)^2. Where the
surrogate calls an item safe (E[(L - g)^2] ~ 0) but a costly mistake is possible, the plain
rule leaves it only the floor's share, and the rare mistake then arrives with weight
~ N/floor. The label-efficiency benchmark (BENCHMARKS.md, selection-rule experiments)
measured the hedge: it removed most of that loss on a shifted pool with cross-entropy and
kept almost all of the gain on well-fit pools; the loss-table form did better than the
bound form there, because an overconfident prediction's mistake is sized by its own
probability rather than by the clip. Without ``loss_bound`` the plain rule is used.

Selection probabilities over the remaining set U_m (unlabeled, unassigned, present):

    q_m(j) = (1 - floor) u(j) / sum_{U_m} u + floor / |U_m|

(defensive mixture; "Weighted average importance sampling and defensive mixture
distributions", Technometrics 1995). If every remaining u is 0 the draw is uniform. The
floor keeps every probability at least floor / |U_m| > 0, so no label is ever taken
without a known, strictly positive probability. There is no deterministic top-k.

``draw_batch`` makes k sequential draws without replacement. Cost: one O(n) pass per batch
(cumulative sums of u) plus O(log n) per draw: the u-component is sampled by inverse CDF
over the batch-start cumulative sum, rejecting already drawn positions, which samples
exactly from the u-proportional distribution over the remaining set; the uniform component
rejects drawn positions likewise.

Per-draw ranges ``correction_low`` / ``correction_high`` bound (L - g) / q_m over the
candidates (with ``max_deviation``, each item's own reach |L - g| instead of [0, B]). They
are computed over the batch-start candidate set (a superset of U_m, so the range is valid,
never narrower than the true one) with each draw's own q_m; q_m(j) only grows as items
leave, which lets an O(n) prefilter find the few items that can attain the extreme for any
draw of the batch.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from ._checks import check_finite_array, check_fraction, describe
from .losses import loss_reach
from .surrogate import SurrogateScores

__all__ = [
    "DEFAULT_FLOOR",
    "WORST_CASE_WEIGHT",
    "DrawBatch",
    "draw_batch",
    "selection_probabilities",
    "usefulness",
]

_LOG = logging.getLogger(__name__)

#: Default defensive floor: share of each draw's probability spread uniformly. 0.3 (the
#: top of the agreed [0.1, 0.3] range): on digits (0-1 loss, 1 000 repetitions) it lifted
#: the 90% fixed-time coverage of UNBIASED from 0.873 (floor 0.2) to 0.891 at M = 50 and
#: narrowed the anytime bound, because it caps the rare large importance weights; the
#: design notes measured it costs little RMSE. The benchmark tunes it.
DEFAULT_FLOOR: float = 0.3

_EXACT_RANGE_CANDIDATES = 65_536  # beyond this many near-ties the range uses the q_0 bound
#: Weight of the worst case in the hedged usefulness (benchmark-measured; see docstring).
WORST_CASE_WEIGHT: float = 0.01

_REJECTION_LIMIT = 64  # rejected tries before the cumulative sum is rebuilt without drawn items


def usefulness(scores: SurrogateScores, *, loss_bound: float | None = None) -> np.ndarray:
    """Residual-spread rule, (n,) >= 0: sqrt(E[(L - g)^2]), or with ``loss_bound`` B the
    hedged sqrt(E[(L - g)^2] + WORST_CASE_WEIGHT W) (module docstring), W the scores'
    ``worst_squared_deviation`` if present, else max(g, B - g)^2.

    Raises ValueError on NaN/inf scores, a shape mismatch, B not finite and > 0, or a
    worst-case deviation outside [0, B^2].
    """
    second = check_finite_array("residual_second_moment", scores.residual_second_moment, ndim=1)
    second = np.maximum(second, 0.0)
    if loss_bound is None:
        return np.asarray(np.sqrt(second))
    bound = float(loss_bound)
    if not (np.isfinite(bound) and bound > 0.0):
        raise ValueError(f"loss_bound = {loss_bound!r}: must be finite and > 0.")
    g = check_finite_array("expected_loss", scores.expected_loss, ndim=1)
    if g.shape != second.shape:
        raise ValueError(
            f"expected_loss has {g.shape[0]} entries: must match residual_second_moment "
            f"({second.shape[0]})."
        )
    if scores.worst_squared_deviation is not None:
        worst = check_finite_array(
            "worst_squared_deviation", scores.worst_squared_deviation, ndim=1
        )
        if worst.shape != second.shape:
            raise ValueError(
                f"worst_squared_deviation has {worst.shape[0]} entries: must match "
                f"residual_second_moment ({second.shape[0]})."
            )
        tolerance = 1e-9 * bound**2
        if worst.size and (worst.min() < -tolerance or worst.max() > bound**2 + tolerance):
            raise ValueError(
                f"worst_squared_deviation range [{describe(worst.min())}, "
                f"{describe(worst.max())}]: must lie in [0, {describe(bound**2)}] (B^2)."
            )
        worst = np.clip(worst, 0.0, bound**2)
    else:
        worst = loss_reach(g, bound) ** 2
    return np.asarray(np.sqrt(second + WORST_CASE_WEIGHT * worst))


def selection_probabilities(usefulness: np.ndarray, *, floor: float) -> np.ndarray:
    """q(j) over the whole given set: (1 - floor) u / sum u + floor / n (uniform if sum u = 0)."""
    u = _check_usefulness(usefulness)
    floor = check_fraction("floor", floor, low_open=True, high_open=False)
    n = u.shape[0]
    total = float(u.sum())
    if n == 0:
        return np.zeros(0)
    if total <= 0.0:
        return np.full(n, 1.0 / n)
    return np.asarray((1.0 - floor) * u / total + floor / n)


@dataclass(frozen=True)
class DrawBatch:
    """k sequential draws without replacement, in draw order (arrays of length k)."""

    positions: np.ndarray
    probabilities: np.ndarray
    remaining_counts: np.ndarray
    remaining_expected_loss: np.ndarray
    remaining_expected_loss_by_group: np.ndarray | None
    correction_low: np.ndarray
    correction_high: np.ndarray
    min_probability: np.ndarray


def _check_usefulness(value: object) -> np.ndarray:
    u = check_finite_array("usefulness", value, ndim=1)
    if u.size and u.min() < 0.0:
        i = int(np.argmin(u))
        raise ValueError(f"usefulness[{i}] = {describe(u[i])}: must be >= 0.")
    return u


def draw_batch(
    usefulness: np.ndarray,
    expected_loss: np.ndarray,
    count: int,
    *,
    floor: float,
    loss_bound: float,
    rng: np.random.Generator,
    groups: np.ndarray | None = None,
    num_groups: int = 0,
    max_deviation: np.ndarray | None = None,
) -> DrawBatch:
    """Draw ``count`` distinct candidates; see the module docstring for the design.

    ``usefulness`` and ``expected_loss`` (g, in [0, loss_bound]) are (n,) over the current
    candidates U_0. ``groups`` (n,) integer codes in [0, num_groups) add per-group sums of g
    over the remaining set. ``max_deviation`` (n,) >= 0, optional: a bound on |L_j - g_j|
    for each candidate (sqrt of ``SurrogateScores.worst_squared_deviation``); the per-draw
    correction ranges then use min(B - g_j, d_j) and min(g_j, d_j) instead of B - g_j and
    g_j, which narrows them where an item's own possible losses are far inside [0, B].
    Raises ValueError (field, value, rule) on NaN/inf, shape mismatch, floor outside
    (0, 1], count < 0 or count > n, g outside [0, loss_bound], a negative max_deviation.
    """
    inputs = _draw_inputs(
        usefulness,
        expected_loss,
        loss_bound=loss_bound,
        max_deviation=max_deviation,
        groups=groups,
        num_groups=num_groups,
    )
    u, g, reach_up, reach_down, codes = (
        inputs.usefulness,
        inputs.expected_loss,
        inputs.reach_up,
        inputs.reach_down,
        inputs.groups,
    )
    n = u.shape[0]
    floor = check_fraction("floor", floor, low_open=True, high_open=False)
    count = _check_count(count, n)
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng = {describe(rng)}: must be a numpy.random.Generator.")

    positions = np.empty(count, dtype=np.int64)
    probabilities = np.empty(count)
    remaining_counts = n - np.arange(count, dtype=np.int64)
    usefulness_left = np.empty(count)  # sum of u over U_m
    scale_u = np.zeros(count)  # A_m in q_m(j) = A_m u_j + b_m
    scale_flat = np.empty(count)  # b_m

    cumulative = np.cumsum(u)
    total_u = float(cumulative[-1]) if n else 0.0
    remaining_u = total_u
    drawn: set[int] = set()
    for m in range(count):
        n_m = n - m
        # Recompute from scratch when subtraction may have lost the sum to rounding.
        # Each subtraction adds rounding error of about 1e-16 * total_u; once the rest is
        # below 1e-4 of the reference its relative error could reach 1e-10, so resum.
        if total_u > 0.0 and remaining_u <= 1e-4 * total_u:
            mask = np.ones(n, dtype=bool)
            mask[list(drawn)] = False
            remaining_u = float(u[mask].sum())
            total_u = remaining_u
        usefulness_left[m] = remaining_u
        if remaining_u > 0.0:
            scale_u[m] = (1.0 - floor) / remaining_u
            scale_flat[m] = floor / n_m
            use_score = rng.random() >= floor
        else:
            scale_flat[m] = 1.0 / n_m
            use_score = False
        tries = 0
        while True:
            if use_score:
                target = rng.random() * cumulative[-1]
                pick = int(np.searchsorted(cumulative, target, side="right"))
                pick = min(pick, n - 1)
            else:
                pick = int(rng.integers(n))
            if pick not in drawn and (not use_score or u[pick] > 0.0):
                break
            tries += 1
            if use_score and tries >= _REJECTION_LIMIT:
                # Most of the score mass was drawn already: rebuild without it (O(n)).
                weights = u.copy()
                weights[list(drawn)] = 0.0
                cumulative = np.cumsum(weights)
                tries = 0
        drawn.add(pick)
        positions[m] = pick
        # A probability is at most 1; the last remaining item's (1 - eps) + eps can round
        # to 1 + 1e-16, which downstream validation rightly refuses.
        probabilities[m] = min(scale_u[m] * u[pick] + scale_flat[m], 1.0)
        remaining_u -= u[pick]

    drawn_g = g[positions]
    before = np.concatenate([[0.0], np.cumsum(drawn_g)[:-1]]) if count else np.zeros(0)
    remaining_expected_loss = float(g.sum()) - before
    by_group = None
    if codes is not None:
        start = np.bincount(codes, weights=g, minlength=num_groups)
        step = np.zeros((count, num_groups))
        if count:
            step[np.arange(count), codes[positions]] = drawn_g
        prior = np.cumsum(step, axis=0) - step
        by_group = start[None, :] - prior
    high, low, min_probability = _correction_ranges(u, reach_up, reach_down, scale_u, scale_flat)
    return DrawBatch(
        positions=positions,
        probabilities=probabilities,
        remaining_counts=remaining_counts,
        remaining_expected_loss=remaining_expected_loss,
        remaining_expected_loss_by_group=by_group,
        correction_low=low,
        correction_high=high,
        min_probability=min_probability,
    )


@dataclass(frozen=True)
class _DrawInputs:
    """Checked inputs of a draw: u (subnormals flushed to 0), g clipped to [0, B], each
    item's reach above / below g, and int64 group codes (None without groups)."""

    usefulness: np.ndarray
    expected_loss: np.ndarray
    reach_up: np.ndarray
    reach_down: np.ndarray
    groups: np.ndarray | None


def _draw_inputs(
    usefulness: object,
    expected_loss: object,
    *,
    loss_bound: float,
    max_deviation: object | None,
    groups: object | None,
    num_groups: int,
) -> _DrawInputs:
    """The checks and derived arrays ``draw_batch`` and ``DrawIndex`` share (one place, so
    both see the same u, g and reach to the last bit)."""
    u = _check_usefulness(usefulness)
    # Subnormal scores would overflow 1 / sum(u); they carry no usable weight anyway.
    u = np.where(u < np.finfo(np.float64).tiny, 0.0, u)
    g = check_finite_array("expected_loss", expected_loss, ndim=1)
    n = u.shape[0]
    if g.shape[0] != n:
        raise ValueError(f"expected_loss has {g.shape[0]} entries: must match usefulness ({n}).")
    bound = float(loss_bound)
    if not (np.isfinite(bound) and bound > 0.0):
        raise ValueError(f"loss_bound = {describe(loss_bound)}: must be finite and > 0.")
    tolerance = 1e-9 * bound
    if n and (g.min() < -tolerance or g.max() > bound + tolerance):
        raise ValueError(
            f"expected_loss range [{describe(g.min())}, {describe(g.max())}]:"
            f" must lie in [0, {describe(bound)}] "
            "(loss_bound)."
        )
    g = np.clip(g, 0.0, bound)
    reach_up, reach_down = bound - g, g
    if max_deviation is not None:
        deviation = check_finite_array("max_deviation", max_deviation, ndim=1)
        if deviation.shape[0] != n:
            raise ValueError(
                f"max_deviation has {deviation.shape[0]} entries: must match usefulness ({n})."
            )
        if n and deviation.min() < 0.0:
            i = int(np.argmin(deviation))
            raise ValueError(f"max_deviation[{i}] = {describe(deviation[i])}: must be >= 0.")
        # A hair of slack: the realised loss is recomputed from the same outputs and may
        # differ from the table entry in the last bits.
        deviation = deviation * (1.0 + 1e-9) + 1e-12 * bound
        reach_up = np.minimum(reach_up, deviation)
        reach_down = np.minimum(reach_down, deviation)
    codes = None
    if groups is not None:
        raw_codes = np.asarray(groups)
        if np.issubdtype(raw_codes.dtype, np.integer) and raw_codes.ndim == 1:
            # Integer codes (the server's case) need no finiteness or integrality check:
            # on a million candidates those checks cost more than the draws themselves.
            codes = raw_codes
            whole = True
        else:
            codes = check_finite_array("groups", groups, ndim=1)
            whole = bool(np.all(codes == np.round(codes)))
        if codes.shape[0] != n:
            raise ValueError(f"groups has {codes.shape[0]} entries: must match usefulness ({n}).")
        if int(num_groups) != num_groups or num_groups < 1:
            raise ValueError(
                f"num_groups = {describe(num_groups)}: must be an integer >= 1 with groups."
            )
        if n and (not whole or codes.min() < 0 or codes.max() >= num_groups):
            raise ValueError(
                f"groups range [{describe(codes.min())}, {describe(codes.max())}]:"
                f" must be integer codes "
                f"in [0, {num_groups})."
            )
        codes = codes.astype(np.int64)
    return _DrawInputs(u, g, reach_up, reach_down, codes)


def _check_count(count: int, candidates: int) -> int:
    """``count`` as an int in [0, candidates] (ValueError naming the field otherwise)."""
    if isinstance(count, bool) or int(count) != count or count < 0:
        raise ValueError(f"count = {describe(count)}: must be an integer >= 0.")
    value = int(count)
    if value > candidates:
        raise ValueError(f"count = {value}: must be <= the number of candidates ({candidates}).")
    return value


def _correction_ranges(
    u: np.ndarray,
    reach_up: np.ndarray,
    reach_down: np.ndarray,
    scale_u: np.ndarray,
    scale_flat: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per draw m: max_j up_j/q_m(j), -max_j down_j/q_m(j) and min_j q_m(j) over the
    batch-start candidates, with q_m(j) = scale_u[m] u_j + scale_flat[m]; up_j / down_j
    bound how far L_j can lie above / below g_j (B - g_j and g_j without more knowledge)."""
    count = scale_u.shape[0]
    if count == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    min_probability = scale_u * float(u.min()) + scale_flat
    q0 = scale_u[0] * u + scale_flat[0]
    # q_m(j) <= kappa q_0(j) for every j and m, so only items with
    # v_j / q_0(j) >= max / kappa can attain the per-draw maximum.
    ratios = [scale_flat / scale_flat[0]]
    if scale_u[0] > 0.0:
        ratios.append(scale_u / scale_u[0])
    else:
        ratios.append(np.zeros(1))
    kappa = float(max(r.max() for r in ratios)) * (1.0 + 1e-12)
    extremes = []
    for value in (reach_up, reach_down):
        ratio = value / q0
        top = float(ratio.max())
        if top <= 0.0:
            extremes.append(np.zeros(count))
            continue
        candidates = np.flatnonzero(ratio >= top / kappa)
        if candidates.size > _EXACT_RANGE_CANDIDATES:
            # Many near-ties (e.g. constant scores): q_m >= q_0 makes ``top`` a valid bound
            # for every draw, loose by at most the factor kappa (about 1 + k / n).
            extremes.append(np.full(count, top))
            continue
        # Among candidates keep those not dominated (larger value at a smaller u).
        order = candidates[np.argsort(u[candidates], kind="stable")]
        sorted_values = value[order]
        running = np.maximum.accumulate(sorted_values)
        keep = np.concatenate([[True], sorted_values[1:] > running[:-1]])
        frontier = order[keep]
        best = np.zeros(count)
        for start in range(0, frontier.size, 4096):
            part = frontier[start : start + 4096]
            q = scale_u[:, None] * u[part][None, :] + scale_flat[:, None]
            best = np.maximum(best, (value[part][None, :] / q).max(axis=1))
        extremes.append(best)
    return extremes[0], -extremes[1], min_probability
