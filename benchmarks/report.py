"""Summaries of benchmark repetitions: metrics, relative labeling cost, targets, tables.

Relative labeling cost of a method at budget M = M / (labels uniform random sampling needs
to reach the method's RMSE); below 1 the method needs fewer labels. Those labels are read
off the i.i.d. baseline's own RMSE curve at the benchmark budgets by linear interpolation in
log(M)-log(RMSE) (where RMSE ~ 1/sqrt(M) is a straight line); beyond the largest budget the
curve is extended as 1/sqrt(M) from its last point (and below the smallest budget
likewise), and such costs are flagged.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from benchmarks.harness import ANYTIME_METHODS, METHODS, HarnessConfig, RepetitionResult
from benchmarks.scenarios import Scenario

__all__ = [
    "METHOD_LABELS",
    "ScenarioSummary",
    "Target",
    "equivalent_iid_labels",
    "evaluate_targets",
    "evaluate_validation_targets",
    "format_table",
    "summarize",
]

METHOD_LABELS: dict[str, str] = {
    "iid": "i.i.d. mean",
    "lure": "LURE, q ~ g (active testing)",
    "surrogate": "SURROGATE plug-in",
    "unbiased": "UNBIASED (leadline)",
    "balanced": "BALANCED (leadline)",
    "oracle": "oracle proposal |L-g|",
    "gate": "UNBIASED, gate floor",
}


def equivalent_iid_labels(
    rmse: float, budgets: Sequence[int], iid_rmse: Sequence[float]
) -> tuple[float, bool]:
    """Labels i.i.d. sampling needs for ``rmse``: (labels, extrapolated).

    The i.i.d. curve is made non-increasing first (running minimum; Monte-Carlo noise can
    make it wiggle), then interpolated linearly in log-log; outside the measured range it is
    extended as RMSE ~ 1/sqrt(M), i.e. labels = M_edge * (RMSE_edge / rmse)^2.
    """
    b = np.asarray(budgets, dtype=float)
    r = np.minimum.accumulate(np.asarray(iid_rmse, dtype=float))
    if b.ndim != 1 or b.shape != r.shape or b.size < 2:
        raise ValueError(f"budgets and iid_rmse must be 1-d of equal length >= 2, got {b.shape}.")
    if not np.all(np.diff(b) > 0):
        raise ValueError(f"budgets = {list(budgets)}: must be strictly increasing.")
    if not (np.isfinite(rmse) and rmse > 0):
        # Zero error: no finite i.i.d. budget matches it; NaN/inf: undefined.
        return (float("inf") if rmse == 0 else float("nan")), True
    reached = np.flatnonzero(r <= rmse)
    if reached.size == 0:  # better than i.i.d. at the largest budget
        return float(b[-1] * (r[-1] / rmse) ** 2), True
    k = int(reached[0]) - 1  # first budget whose i.i.d. RMSE is <= rmse is k + 1
    if k < 0:  # no better than i.i.d. at the smallest budget
        return float(b[0] * (r[0] / rmse) ** 2), bool(rmse > r[0])
    if r[k + 1] == rmse:
        return float(b[k + 1]), False
    lr, lb = np.log(r), np.log(b)
    t = (np.log(rmse) - lr[k]) / (lr[k + 1] - lr[k])
    return float(np.exp(lb[k] + t * (lb[k + 1] - lb[k]))), False


@dataclass(frozen=True)
class ScenarioSummary:
    """Metrics of one scenario; arrays are (len(METHODS), len(budgets)) unless stated."""

    name: str
    description: str
    pool_size: int
    true_risk: float
    loss_bound: float
    well_fit_classifier: bool
    repetitions: int
    budgets: tuple[int, ...]
    rmse: np.ndarray
    bias: np.ndarray
    width: np.ndarray
    coverage: np.ndarray
    cost: np.ndarray
    cost_extrapolated: np.ndarray
    # (len(ANYTIME_METHODS),): share of runs whose path contains the risk at every m >= from.
    anytime_never_miss: np.ndarray
    # (len(ANYTIME_METHODS), len(budgets)): mean width of the anytime bound at each budget.
    anytime_width: np.ndarray
    balanced_weight: np.ndarray  # (len(budgets),) mean lambda of BALANCED
    seconds_per_repetition: float
    fit_share: float
    # Share of runs where a single-look FIXED_TIME gate at the true risk said PASS (wrong).
    wrong_pass: np.ndarray | None = None
    hard: bool = False

    def at(self, metric: str, method: str, budget: int) -> float:
        return float(getattr(self, metric)[METHODS.index(method), self.budgets.index(budget)])


def summarize(
    scenario: Scenario, results: Sequence[RepetitionResult], config: HarnessConfig
) -> ScenarioSummary:
    """Aggregate the repetitions of one scenario."""
    if not results:
        raise ValueError(f"scenario {scenario.name!r}: no repetitions to summarize.")
    with warnings.catch_warnings():
        # Methods not run (experiments) are all-NaN rows: their means are NaN by design.
        warnings.simplefilter("ignore", RuntimeWarning)
        return _summarize(scenario, results, config)


def _summarize(
    scenario: Scenario, results: Sequence[RepetitionResult], config: HarnessConfig
) -> ScenarioSummary:
    risk = scenario.true_risk
    est = np.stack([r.estimate for r in results])
    lo = np.stack([r.lower for r in results])
    hi = np.stack([r.upper for r in results])
    err = est - risk
    rmse = np.sqrt(np.nanmean(err**2, axis=0))
    bias = np.nanmean(err, axis=0)
    width = np.nanmean(hi - lo, axis=0)
    coverage = np.nanmean((lo <= risk) & (risk <= hi), axis=0)
    coverage[np.all(np.isnan(est), axis=0)] = np.nan

    budgets = config.budgets
    iid = rmse[METHODS.index("iid")]
    cost = np.full_like(rmse, np.nan)
    extrapolated = np.zeros(rmse.shape, dtype=bool)
    for i in range(len(METHODS)):
        for b, m in enumerate(budgets):
            if np.isnan(rmse[i, b]):
                continue
            labels, flag = equivalent_iid_labels(float(rmse[i, b]), budgets, iid)
            # labels used / labels i.i.d. needs for the same RMSE (below 1 is better).
            cost[i, b], extrapolated[i, b] = m / labels, flag

    any_lo = np.stack([r.anytime_lower for r in results])  # (R, A, T)
    any_hi = np.stack([r.anytime_upper for r in results])
    start = config.anytime_from - 1
    inside = (any_lo[:, :, start:] <= risk) & (risk <= any_hi[:, :, start:])
    never_miss = np.mean(np.all(inside, axis=2), axis=0)
    never_miss[np.all(np.isnan(any_lo[:, :, start]), axis=0)] = np.nan
    idx = np.asarray(budgets) - 1
    anytime_width = np.nanmean(any_hi[:, :, idx] - any_lo[:, :, idx], axis=0)

    passes = [r.gate_pass for r in results if r.gate_pass is not None]
    wrong_pass = np.nanmean(np.stack(passes), axis=0) if passes else None
    seconds = float(np.mean([r.seconds for r in results]))
    fit = float(np.sum([r.fit_seconds for r in results]) / max(1e-9, seconds * len(results)))
    return ScenarioSummary(
        name=scenario.name,
        description=scenario.description,
        pool_size=scenario.pool_size,
        true_risk=risk,
        loss_bound=float(scenario.spec.bound),
        well_fit_classifier=scenario.well_fit_classifier,
        repetitions=len(results),
        budgets=tuple(budgets),
        rmse=rmse,
        bias=bias,
        width=width,
        coverage=coverage,
        cost=cost,
        cost_extrapolated=extrapolated,
        anytime_never_miss=never_miss,
        anytime_width=anytime_width,
        balanced_weight=np.nanmean(np.stack([r.balanced_weight for r in results]), axis=0),
        seconds_per_repetition=seconds,
        fit_share=fit,
        wrong_pass=wrong_pass,
        hard=scenario.hard,
    )


@dataclass(frozen=True)
class Target:
    """One target of issue 4 with its measured value and verdict."""

    name: str
    measured: str
    met: bool


def _fmt(x: float, digits: int = 2) -> str:
    return "n/a" if not np.isfinite(x) else f"{x:.{digits}f}"


#: Fixed-time width at M = 100 and BALANCED relative cost at M = 100 of the well-behaved
#: pools BEFORE the valid fixed-time interval and the reliance guard (BENCHMARKS.md of
#: commit 1b8aa8f, full run of 300 repetitions: a t interval with a model-guarded variance).
#: The honest-intervals issue bounds today's width by 1.3x these and the savings given back
#: by 0.05.
BEFORE_WIDTH_100: dict[str, dict[str, float]] = {
    "digits_logistic": {"unbiased": 0.0637, "balanced": 0.0664},
    "digits_weak_tree": {"unbiased": 0.1140, "balanced": 0.1198},
    "breast_cancer": {"unbiased": 0.0507, "balanced": 0.0527},
    "cost_matrix_triage": {"unbiased": 0.5138, "balanced": 0.5426},
}
BEFORE_BALANCED_COST_100: dict[str, float] = {
    "digits_logistic": 0.50,
    "digits_weak_tree": 0.54,
    "breast_cancer": 0.75,
    "cost_matrix_triage": 0.73,
}
#: Pools where BALANCED did not save before (same run): "no scenario worse than before".
BEFORE_BALANCED_COST_100_OTHERS: dict[str, float] = {
    "shifted_synthetic": 1.17,
    "friedman_regression": 0.99,
}
#: Monte-Carlo movement of a relative cost between runs of 300 repetitions (about twice the
#: relative standard error sqrt(2 / 300) of a mean squared error; common practice, no source).
COST_NOISE: float = 0.10


def evaluate_targets(
    summaries: Sequence[ScenarioSummary],
    *,
    wall_seconds: float,
    quick: bool,
    eval_budget: int = 100,
) -> list[Target]:
    """This wave's targets, measured at ``eval_budget`` (must be one of the budgets)."""
    targets: list[Target] = []
    m = eval_budget
    reps = min(s.repetitions for s in summaries)
    se = (0.9 * 0.1 / reps) ** 0.5
    for method in ("unbiased", "balanced"):
        cells = [(s.name, b, s.at("coverage", method, b)) for s in summaries for b in s.budgets]
        low = min(cells, key=lambda c: c[2])
        targets.append(
            Target(
                f"{method.upper()} 90% fixed-time coverage >= 0.87 at every M on every pool "
                f"(Monte-Carlo SE {se:.3f})",
                f"lowest {_fmt(low[2], 3)} ({low[0]}, M={low[1]})",
                low[2] >= 0.87,
            )
        )
        if all(s.wrong_pass is not None for s in summaries):
            passes = {s.name: s.at("wrong_pass", method, m) for s in summaries}
            worst = max(passes, key=lambda k: passes[k])
            targets.append(
                Target(
                    f"{method.upper()} single-look FIXED_TIME gate at the true risk: wrong PASS "
                    f"<= 0.10 + 2 SE at M={m} on every pool",
                    f"worst {worst} {_fmt(passes[worst], 3)}",
                    passes[worst] <= 0.10 + 2 * se,
                )
            )
    ratios = {
        (s.name, method): s.at("width", method, m) / before
        for s in summaries
        for method, before in BEFORE_WIDTH_100.get(s.name, {}).items()
    }
    if ratios:
        targets.append(
            Target(
                f"fixed-time width at M={m} on the well-behaved pools <= 1.3x the width before "
                "the valid interval",
                ", ".join(f"{k[0]} {k[1]} {_fmt(v)}" for k, v in ratios.items()),
                max(ratios.values()) <= 1.3,
            )
        )
    costs = {s.name: s.at("cost", "balanced", m) for s in summaries}
    worst_name = max(costs, key=lambda k: costs[k])
    median = float(np.median(list(costs.values())))
    targets.append(
        Target(
            f"BALANCED relative cost at M={m} <= 1.05 on every pool",
            f"worst {worst_name} {_fmt(costs[worst_name])}; median {_fmt(median)}",
            costs[worst_name] <= 1.05,
        )
    )
    given_back = {k: costs[k] - v for k, v in BEFORE_BALANCED_COST_100.items() if k in costs}
    if given_back:
        targets.append(
            Target(
                f"BALANCED relative cost at M={m} gives back <= 0.05 of the earlier savings",
                ", ".join(f"{k} {v:+.2f}" for k, v in given_back.items()),
                max(given_back.values()) <= 0.05,
            )
        )
    k = ANYTIME_METHODS.index("unbiased")
    rates = {s.name: float(s.anytime_never_miss[k]) for s in summaries}
    worst = min(rates, key=lambda n: rates[n])
    targets.append(
        Target(
            "anytime bound (leadline's draws) never misses in >= 95% of runs, every M >= 10",
            f"worst {worst} {_fmt(rates[worst], 3)}",
            rates[worst] >= 0.95,
        )
    )
    g, i = ANYTIME_METHODS.index("gate"), ANYTIME_METHODS.index("iid")
    b = summaries[0].budgets.index(m)
    wr = {s.name: float(s.anytime_width[g, b] / s.anytime_width[i, b]) for s in summaries}
    targets.append(
        Target(
            f"gate-floor anytime width at M={m} no wider than the same bound under i.i.d.",
            ", ".join(f"{k} {_fmt(v)}" for k, v in wr.items()),
            max(wr.values()) <= 1.0,
        )
    )
    limit = 180.0 if quick else 3600.0
    targets.append(
        Target(
            f"wall time <= {int(limit // 60)} minutes ({'quick' if quick else 'full'} run)",
            f"{wall_seconds / 60:.1f} minutes",
            wall_seconds <= limit,
        )
    )
    return targets


def evaluate_validation_targets(
    with_rows: Sequence[ScenarioSummary],
    without: Sequence[ScenarioSummary],
    *,
    eval_budget: int = 100,
) -> list[Target]:
    """The validation-items issue's targets: costs with validation items, coverage with
    them, and no scenario worse without them than before."""
    m = eval_budget
    targets: list[Target] = []
    costs = {s.name: s.at("cost", "balanced", m) for s in with_rows}
    median = float(np.median(list(costs.values())))
    targets.append(
        Target(
            f"with validation items: BALANCED relative cost at M={m}, median <= 0.35",
            f"median {_fmt(median)}",
            median <= 0.35,
        )
    )
    for names, limit in (
        (("digits_weak_tree",), 0.20),
        (("friedman_regression", "cost_matrix_triage"), 0.60),
    ):
        present = {n: costs[n] for n in names if n in costs}
        if present:
            targets.append(
                Target(
                    f"with validation items: BALANCED cost at M={m} <= {limit:.2f} on "
                    + " and ".join(present),
                    ", ".join(f"{k} {_fmt(v)}" for k, v in present.items()),
                    max(present.values()) <= limit,
                )
            )
    worst = max(costs, key=lambda k: costs[k])
    targets.append(
        Target(
            f"with validation items: no scenario above 1.0 (BALANCED cost at M={m})",
            f"worst {worst} {_fmt(costs[worst])}",
            costs[worst] <= 1.0,
        )
    )
    low = min(
        (
            (s.name, b, s.at("coverage", method, b))
            for s in with_rows
            for b in s.budgets
            for method in ("unbiased", "balanced")
        ),
        key=lambda c: c[2],
    )
    targets.append(
        Target(
            "with validation items: fixed-time 90% coverage >= 0.87 at every M",
            f"lowest {_fmt(low[2], 3)} ({low[0]}, M={low[1]})",
            low[2] >= 0.87,
        )
    )
    k = ANYTIME_METHODS.index("unbiased")
    rates = {s.name: float(s.anytime_never_miss[k]) for s in with_rows}
    worst_rate = min(rates, key=lambda n: rates[n])
    targets.append(
        Target(
            "with validation items: anytime never-miss >= 0.95 on every scenario",
            f"worst {worst_rate} {_fmt(rates[worst_rate], 3)}",
            rates[worst_rate] >= 0.95,
        )
    )
    before = {**BEFORE_BALANCED_COST_100, **BEFORE_BALANCED_COST_100_OTHERS}
    moved = {
        s.name: s.at("cost", "balanced", m) - before[s.name] for s in without if s.name in before
    }
    if moved:
        targets.append(
            Target(
                f"without validation items: no scenario worse than before beyond noise "
                f"(+{COST_NOISE:.2f})",
                ", ".join(f"{k} {v:+.2f}" for k, v in moved.items()),
                max(moved.values()) <= COST_NOISE,
            )
        )
    return targets


def format_table(summary: ScenarioSummary, *, markdown: bool) -> str:
    """Per-method table of one scenario: RMSE and cost at every budget, plus M=100 details."""
    budgets = summary.budgets
    header = (
        ["method"]
        + [f"RMSE@{m}" for m in budgets]
        + [f"cost@{m}" for m in budgets]
        + ["|bias|@100", "width@100"]
        + [f"cov@{m}" for m in budgets]
        + ["wrong PASS@100"]
    )
    rows: list[list[str]] = []
    for i, method in enumerate(METHODS):
        if np.all(np.isnan(summary.rmse[i])):
            continue
        row = [METHOD_LABELS[method]]
        row += [_fmt(summary.rmse[i, b], 4) for b in range(len(budgets))]
        for b in range(len(budgets)):
            mark = "*" if summary.cost_extrapolated[i, b] else ""
            row.append(_fmt(summary.cost[i, b]) + mark)

        def cell(
            metric: str, m: int, digits: int, *, absolute: bool = False, row_index: int = i
        ) -> str:
            if m not in budgets:
                return "-"
            value = getattr(summary, metric)[row_index, budgets.index(m)]
            return _fmt(abs(value) if absolute else value, digits)

        row += [cell("bias", 100, 4, absolute=True), cell("width", 100, 4)]
        row += [cell("coverage", m, 3) for m in budgets]
        row.append("-" if summary.wrong_pass is None else cell("wrong_pass", 100, 3))
        rows.append(row)
    if markdown:
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        lines += ["| " + " | ".join(r) + " |" for r in rows]
        return "\n".join(lines)
    widths = [max(len(h), *(len(r[c]) for r in rows)) for c, h in enumerate(header)]
    fmt = "  ".join(f"{{:<{w}}}" if c == 0 else f"{{:>{w}}}" for c, w in enumerate(widths))
    return "\n".join([fmt.format(*header)] + [fmt.format(*r) for r in rows])


def format_anytime(summary: ScenarioSummary, *, markdown: bool, budget: int = 100) -> str:
    """Anytime bound: never-miss rate and width at ``budget`` beside the fixed-time width."""
    b = summary.budgets.index(budget)
    parts = []
    for k, name in enumerate(ANYTIME_METHODS):
        fixed_method = "unbiased" if name == "unbiased" else name
        fixed = summary.width[METHODS.index(fixed_method), b]
        parts.append(
            f"{name}: never-miss {_fmt(summary.anytime_never_miss[k], 3)}, "
            f"anytime width@{budget} {_fmt(summary.anytime_width[k, b], 4)} "
            f"(fixed-time {_fmt(fixed, 4)})"
        )
    text = "; ".join(parts)
    return f"Anytime bound — {text}" if not markdown else f"- anytime bound: {text}"
