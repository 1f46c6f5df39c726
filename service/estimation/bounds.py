"""Confidence bounds on the scope risk from the per-draw terms a_m, valid in finite samples.

Every bound here rests on one fact: E[a_m | draws before m] = risk, and each a_m lies in a
range [lo_m, hi_m] known before draw m (the logged correction range). Nothing assumes a
normal approximation, so a bound cannot be fooled by a rare costly mistake that has not
been drawn yet: its possibility is priced through the range.

Fixed-time bound (one look at a sample size chosen in advance):

- ``betting_fixed_lower_bound``: the betting confidence interval for bounded means
  ("Estimating means of bounded random variables by betting", JRSS-B 2024, its fixed-time
  intervals). The lower-side capital after all M terms is
  K_M(r) = prod_t (1 + lambda_t(r) (x_t - r)) with predictable bets tuned for M,
  lambda_t = sqrt(2 log(1/alpha) / (M v_t tau_{t-1}^2)), truncated at c / (r - lo_t). Under
  r = risk, K_M is a nonnegative supermartingale with E[K_M] <= 1, so by Markov's
  inequality P(K_M(risk) >= 1/alpha) <= alpha: every r with K_M(r) >= 1/alpha is excluded.
  ``scale`` v_t (optional, predictable) is each term's variance relative to the others
  (finite-population shrinkage near census); tau^2 is the running mean of the past terms'
  squared deviations divided by their v.

Anytime-valid bounds (confidence sequences, valid however often they are queried):

- ``betting`` (default): hedged-capital style betting confidence sequence, "Estimating
  means of bounded random variables by betting", JRSS-B 2024. For each candidate risk r the
  lower-side capital is K_m(r) = prod_{t<=m} (1 + lambda_t(r) (x_t - r)) with a
  predictable, variance-adaptive bet lambda_t = sqrt(2 log(1/alpha) / (sigma_{t-1}^2 t
  log(1 + t))) (the paper's predictable plug-in), truncated at c / (r - lo_t) so capital
  stays nonnegative given the per-draw range [lo_t, hi_t] known before draw t. Under
  r = risk the capital is a nonnegative supermartingale, so by Ville's inequality it ever
  reaches 1/alpha with probability <= alpha; every r whose capital did is excluded. The
  capital is decreasing in r, so the excluded set is a half-line: the path's edge is found
  on a grid (rounded outwards) and the final value by a bracketing root search
  (``_excluded_edge``). The upper side mirrors it.
- ``empirical_bernstein``: the predictable-plug-in empirical-Bernstein confidence sequence
  (same paper, building on "Time-uniform, nonparametric, nonasymptotic confidence
  sequences", Annals of Statistics 2021), closed form and O(1) per new term.

Both one-sided sides run at alpha each; callers split alpha for two-sided statements.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Callable

import numpy as np

__all__ = [
    "BET_TRUNCATION",
    "BoundKind",
    "betting_fixed_lower_bound",
    "betting_lower_path",
    "betting_lower_bound",
    "empirical_bernstein_lower_path",
]

#: Largest share of capital a single bet may risk (the paper's truncation c; it suggests
#: 1/2 or 3/4). Importance-weighted terms have ranges far wider than their spread, so a
#: worst-case term is rare and a larger c pays: on digits (M = 100, floor 0.3) the upper
#: bound sat 0.124 above the risk with c = 3/4 and 0.106 with c = 0.9 (i.i.d. sampling with
#: the same code: 0.130 and 0.146). Validity does not depend on c.
BET_TRUNCATION: float = 0.9

_GRID_UNIFORM = 257
_GRID_LOG_POINTS = 240
# The edge search stops when its bracket is this many units in the last place wide (or
# as narrow as this many bisection steps from the whole support would leave it), and
# after at most _EDGE_STEPS steps.
_EDGE_ULPS = 4
_BISECTION_STEPS = 60
_EDGE_STEPS = 200


class BoundKind(enum.Enum):
    """Which interval a gate compares with max_risk (values: the proto enum's suffixes)."""

    FIXED_TIME = "fixed_time"
    ANYTIME = "anytime"


Prior = tuple[float, float] | None


def _prior(lo: np.ndarray, hi: np.ndarray, prior: Prior) -> tuple[float, float]:
    if prior is not None:
        return prior
    return 0.5 * (lo[0] + hi[0]), (0.5 * (hi[0] - lo[0])) ** 2


def _base_bets(
    x: np.ndarray, lo: np.ndarray, hi: np.ndarray, alpha: float, prior: Prior
) -> np.ndarray:
    """Predictable plug-in bet sizes lambda_t (before truncation), using x_0..x_{t-1} only.

    ``prior`` = (mean, variance) enters as one pseudo-observation; without it the first
    range's midpoint and half-width are used (the paper's choice for [0, 1] data).
    """
    m = x.shape[0]
    if m == 0:
        return np.zeros(0)
    t = np.arange(1, m + 1, dtype=np.float64)
    prior_mean, prior_var = _prior(lo, hi, prior)
    # running mean before each x_i (including the prior as one pseudo-observation)
    csum = np.concatenate([[0.0], np.cumsum(x)])
    mean_before = (prior_mean + csum[:-1]) / t  # mu_{i-1}, i = 0..m-1
    squares = (x - mean_before) ** 2
    sq_sum = np.concatenate([[0.0], np.cumsum(squares)])[:-1]
    variance_before = (prior_var + sq_sum) / t
    variance_before = np.maximum(variance_before, 1e-30)
    return np.sqrt(2.0 * math.log(1.0 / alpha) / (variance_before * t * np.log1p(t)))


def _fixed_bets(
    x: np.ndarray, lo: np.ndarray, hi: np.ndarray, alpha: float, prior: Prior, scale: np.ndarray
) -> np.ndarray:
    """Bets for the fixed-time interval: lambda_t = sqrt(2 log(1/alpha) / (M v_t tau^2)),
    tau^2 from x_0..x_{t-1} only (``prior`` = one pseudo-observation, as in ``_base_bets``).
    """
    m = x.shape[0]
    t = np.arange(1, m + 1, dtype=np.float64)
    prior_mean, prior_var = _prior(lo, hi, prior)
    csum = np.concatenate([[0.0], np.cumsum(x)])
    mean_before = (prior_mean + csum[:-1]) / t
    squares = (x - mean_before) ** 2 / scale
    sq_sum = np.concatenate([[0.0], np.cumsum(squares)])[:-1]
    # The prior's variance is stated for a term of relative variance 1 (the first one).
    tau_before = np.maximum((prior_var / float(scale[0]) + sq_sum) / t, 1e-30)
    bets: np.ndarray = np.sqrt(2.0 * math.log(1.0 / alpha) / (m * scale * tau_before))
    return bets


def betting_fixed_lower_bound(
    x: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    *,
    alpha: float,
    support: tuple[float, float],
    prior: Prior = None,
    scale: np.ndarray | None = None,
) -> float:
    """Lower confidence bound at level 1 - alpha for ONE look after all M terms.

    A bracketing search (``_excluded_edge``) on the candidate risk over ``support`` (the
    final capital decreases in r, so the excluded set is a half-line); the value returned
    is itself excluded (conservative). ``scale`` (M,) > 0: predictable relative variances
    of the terms (default all 1). See the module docstring for the construction.
    """
    m = x.shape[0]
    if m == 0:
        return float(support[0])
    v = np.ones(m) if scale is None else np.maximum(np.asarray(scale, dtype=np.float64), 1e-300)
    bets = _fixed_bets(x, lo, hi, alpha, prior, v)
    threshold = math.log(1.0 / alpha)

    def margin(r: float) -> float:
        return float(np.sum(_log_factors(x, lo, bets, r))) - threshold

    return _excluded_edge(margin, support)


def _excluded_edge(margin: Callable[[float], float], support: tuple[float, float]) -> float:
    """The edge of the excluded candidates of ``support``, to float precision: the
    largest candidate found whose ``margin`` (log capital minus log(1/alpha)) is >= 0.

    The margin decreases in r (the capital does), so the excluded candidates form a lower
    half-line. The edge is bracketed by a candidate seen excluded and one seen standing,
    and the bracket is narrowed by regula falsi with the Illinois modification (the
    retained end's value is halved when the same end is kept twice; superlinear on a
    smooth margin, "A modified regula falsi method for computing the root of an
    equation", BIT 1971) with a bisection step whenever the bracket failed to halve over
    two steps (so it never does worse than bisection). About a dozen margins instead of the
    ~60 of plain bisection; the value returned was itself seen excluded (conservative).
    """
    rejected, accepted = float(support[0]), float(support[1])
    low = margin(rejected)
    if not low >= 0.0:
        return rejected
    high = margin(accepted)
    if high >= 0.0:
        return accepted
    kept = 0  # +1: the excluded end moved last, -1: the standing end did
    widths = [math.inf, math.inf]
    # As fine as 60 bisection steps from the whole support, or a few ulps of the edge.
    finest = math.ldexp(accepted - rejected, -_BISECTION_STEPS)
    for _ in range(_EDGE_STEPS):
        width = accepted - rejected
        if width <= max(finest, _EDGE_ULPS * math.ulp(max(abs(rejected), abs(accepted)))):
            break
        middle = 0.5 * (rejected + accepted)
        if width > 0.5 * widths[-2]:
            candidate = middle
        else:
            candidate = rejected + width * (low / (low - high))
            if not rejected < candidate < accepted:
                candidate = middle
        value = margin(candidate)
        widths.append(width)
        if value >= 0.0:
            rejected, low = candidate, value
            if kept == 1:
                high *= 0.5
            kept = 1
        else:
            accepted, high = candidate, value
            if kept == -1:
                low *= 0.5
            kept = -1
    return rejected


def _log_factors(x: np.ndarray, lo: np.ndarray, bets: np.ndarray, r: float) -> np.ndarray:
    """(M,) log of each term's capital factor at one candidate mean r (``_log_capital``
    for a single candidate, without its 2-D temporaries)."""
    room = r - lo
    with np.errstate(divide="ignore"):
        lam = np.where(room > 0.0, np.minimum(bets, BET_TRUNCATION / room), bets)
    return np.asarray(np.log1p(lam * (x - r)))


def _log_capital(x: np.ndarray, lo: np.ndarray, bets: np.ndarray, r: np.ndarray) -> np.ndarray:
    """(M, G) log of each term's capital factor at candidate means r (G,)."""
    room = r[None, :] - lo[:, None]
    with np.errstate(divide="ignore"):
        cap = np.where(room > 0.0, BET_TRUNCATION / np.where(room > 0, room, 1.0), np.inf)
    lam = np.minimum(bets[:, None], cap)
    return np.asarray(np.log1p(lam * (x[:, None] - r[None, :])))


def _grid(low: float, high: float, center: float) -> np.ndarray:
    span = high - low
    offsets = span * np.logspace(-6, 0, _GRID_LOG_POINTS)
    points = np.concatenate(
        [np.linspace(low, high, _GRID_UNIFORM), center - offsets, center + offsets]
    )
    points = points[(points >= low) & (points <= high)]
    return np.unique(points)


def betting_lower_path(
    x: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    *,
    alpha: float,
    support: tuple[float, float],
    center: float,
    prior: Prior = None,
) -> np.ndarray:
    """Lower confidence sequence after each term (length M), on a grid over ``support``.

    Conservative rounding: each value is a grid point whose capital crossed 1/alpha, or
    ``support[0]`` when none did.
    """
    m = x.shape[0]
    if m == 0:
        return np.zeros(0)
    bets = _base_bets(x, lo, hi, alpha, prior)
    grid = _grid(support[0], support[1], center)
    threshold = math.log(1.0 / alpha)
    size = grid.shape[0]
    lower = np.full(m, float(support[0]))
    total = np.zeros(size)
    best = np.full(size, -np.inf)
    chunk = max(1, 2_000_000 // size)
    for start in range(0, m, chunk):
        stop = min(m, start + chunk)
        logs = _log_capital(x[start:stop], lo[start:stop], bets[start:stop], grid)
        running = total[None, :] + np.cumsum(logs, axis=0)
        total = running[-1]
        peak = np.maximum.accumulate(np.maximum(running, best[None, :]), axis=0)
        best = peak[-1]
        # Excluded candidates form a prefix of the grid; report the last point before the
        # first candidate still standing (conservative under rounding noise).
        standing = peak < threshold
        first = np.where(standing.any(axis=1), np.argmax(standing, axis=1), size)
        lower[start:stop] = np.where(first > 0, grid[np.maximum(first - 1, 0)], support[0])
    return np.maximum.accumulate(lower)


def betting_lower_bound(
    x: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    *,
    alpha: float,
    support: tuple[float, float],
    prior: Prior = None,
) -> float:
    """Final value of the lower confidence sequence, by a bracketing search on the
    candidate risk.

    The excluded set is a half-line (capital decreases in r), so ``_excluded_edge`` over
    ``support`` finds its edge in O(M) per step; the value returned is itself excluded
    (conservative).
    """
    m = x.shape[0]
    if m == 0:
        return float(support[0])
    bets = _base_bets(x, lo, hi, alpha, prior)
    threshold = math.log(1.0 / alpha)

    def margin(r: float) -> float:
        return float(np.max(np.cumsum(_log_factors(x, lo, bets, r)))) - threshold

    return _excluded_edge(margin, support)


def empirical_bernstein_lower_path(
    x: np.ndarray, lo: np.ndarray, hi: np.ndarray, *, alpha: float, prior: Prior = None
) -> np.ndarray:
    """Predictable-plug-in empirical-Bernstein lower confidence sequence (length M).

    Per term, with mu_{t-1} the running mean clipped into [lo_t, hi_t], room
    w_t = mu_{t-1} - lo_t and xi_t = (x_t - mu_{t-1}) / w_t >= -1, the process
    exp(sum lambda_t (x_t - r) - psi(lambda_t w_t) xi_t^2), psi(u) = -log(1 - u) - u, is a
    nonnegative supermartingale for r = risk (Fan's inequality), hence
    risk >= (sum lambda_t x_t - sum psi xi^2 - log(1/alpha)) / sum lambda_t.
    """
    m = x.shape[0]
    if m == 0:
        return np.zeros(0)
    bets = _base_bets(x, lo, hi, alpha, prior)
    t = np.arange(1, m + 1, dtype=np.float64)
    prior_mean, _ = _prior(lo, hi, prior)
    csum = np.concatenate([[0.0], np.cumsum(x)])
    mean_before = np.clip((prior_mean + csum[:-1]) / t, lo, hi)
    room = np.maximum(mean_before - lo, 1e-12 * np.maximum(hi - lo, 1e-300))
    lam = np.minimum(bets, BET_TRUNCATION / room)
    u = lam * room
    psi = -np.log1p(-u) - u
    xi = (x - mean_before) / room
    numerator = np.cumsum(lam * x) - np.cumsum(psi * xi**2) - math.log(1.0 / alpha)
    path = numerator / np.cumsum(lam)
    return np.maximum.accumulate(path)
