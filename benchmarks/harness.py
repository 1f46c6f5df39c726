"""One repetition of the label-efficiency benchmark: every method on the same pool.

A repetition makes ``max(budgets)`` sequential draws per method and evaluates every budget
prefix M: the first M draws of a sequential design are themselves a valid design (each
draw's probability and control variate were fixed before it), so one run serves all
budgets.

Methods (all on the same pool, same repetition seed):

- ``iid``: uniform random sampling without replacement, sample mean, 90% t interval with
  the finite-population correction ("Sampling Techniques", 3rd ed., 1977, §2.6).
- ``lure``: the active-testing baseline; proposal q proportional to the surrogate's expected
  loss (with the same floor), LURE weights (``lure_weights``), normal interval from the
  weighted losses' sample variance (common practice, no source).
- ``unbiased`` / ``balanced`` / ``surrogate``: leadline's selection (``usefulness`` +
  ``draw_batch``) with its own refit surrogate; the three estimator modes of
  ``estimate_risk`` on the same draws.
- ``oracle``: the proposal q proportional to |L - g| from the TRUE losses (unattainable; the
  limit of what a proposal can do with this surrogate), UNBIASED estimator.
- ``gate``: leadline's selection with the gate floor (a larger epsilon: docs/estimation.md
  §6, pools gated often draw with a larger floor) for the anytime bound, UNBIASED
  estimator.

The surrogate sequence is fitted once per repetition, on leadline's own labels, at the
refit points; ``lure``, ``oracle`` and ``gate`` reuse that sequence. A surrogate fitted on
another run's labels is independent of this run's draws, so it is a valid (predictable)
control variate and proposal for them, and the comparison isolates the proposal.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from benchmarks.scenarios import Scenario
from leadline.service.estimation import (
    DEFAULT_FLOOR,
    DRAW_LABELED,
    BoundKind,
    DrawTerms,
    EstimatorMode,
    LossSpec,
    PlugInSums,
    Reliance,
    SurrogateScores,
    SurrogateSettings,
    ValidationRows,
    Verdict,
    anytime_path,
    check_gate,
    choose_reliance,
    cold_start_surrogate,
    cross_fitted_scores,
    draw_batch,
    estimate_risk,
    fit_surrogate,
    lure_weights,
    usefulness,
)

__all__ = [
    "METHODS",
    "RuleContext",
    "ANYTIME_METHODS",
    "HarnessConfig",
    "RepetitionResult",
    "UsefulnessRule",
    "run_repetition",
]

METHODS: tuple[str, ...] = ("iid", "lure", "surrogate", "unbiased", "balanced", "oracle", "gate")
# Runs whose anytime path is recorded (time-uniform bound over every peek).
ANYTIME_METHODS: tuple[str, ...] = ("unbiased", "gate", "iid")


@dataclass(frozen=True)
class RuleContext:
    """What an experimental usefulness rule may look at besides the scores (candidates only):
    label-free inputs and how many labels the surrogate has seen."""

    features: np.ndarray
    outputs: np.ndarray
    spec: LossSpec
    label_count: int


UsefulnessRule = Callable[[SurrogateScores, RuleContext], np.ndarray]
"""(scores over the candidates, their context) -> usefulness >= 0."""


def _core_usefulness(scores: SurrogateScores, context: RuleContext) -> np.ndarray:
    # With the loss bound the core hedges against an overconfident surrogate.
    return np.asarray(usefulness(scores, loss_bound=context.spec.bound), dtype=float)


@dataclass(frozen=True, kw_only=True)
class HarnessConfig:
    """Everything a repetition needs besides the scenario. Picklable (sent to workers)."""

    budgets: tuple[int, ...] = (10, 25, 50, 100, 200)
    batch_size: int = 10
    refit_at: tuple[int, ...] = (10, 25, 50, 100)
    floor: float = DEFAULT_FLOOR
    gate_floor: float = 0.85
    # leadline's runs choose each batch's control variate and floor with the core's
    # reliance guard (``choose_reliance``); False = full reliance on the surrogate.
    guard: bool = True
    # Teach the surrogate with the scenario's validation rows (out-of-fold outputs on its
    # training part) from the first draw on.
    validation: bool = False
    # Refits that land late: the draws use the surrogate fitted this many refit points
    # earlier (0 = every refit is in force for the next draw).
    refit_lag: int = 0
    # Experiment (not adopted): leadline's runs raise the floor per batch with
    # benchmarks.experiments.adaptive_floor.
    adaptive_floor: bool = False
    # Experiment: at each refit keep the cold start instead of the new fit when, on the
    # draws made since the first refit, the fitted surrogates' honest predictions (each
    # from a fit that had not seen the item) erred more than the cold start's.
    cold_start_guard: bool = False
    confidence: float = 0.9
    anytime_from: int = 10
    seed: int = 20261202
    surrogate_settings: SurrogateSettings = field(default_factory=SurrogateSettings)
    # Name of a rule in benchmarks.experiments.variants (None = the core's usefulness).
    usefulness_rule: str | None = None
    # Which proposals to run besides leadline's (experiments skip the others to save time).
    with_baselines: bool = True

    def __post_init__(self) -> None:
        if not self.budgets or list(self.budgets) != sorted(set(self.budgets)):
            raise ValueError(f"budgets={self.budgets}, must be strictly increasing, non-empty.")
        if self.budgets[0] < 2:
            raise ValueError(f"budgets[0]={self.budgets[0]}, must be >= 2 (interval needs 2).")
        if self.batch_size < 1:
            raise ValueError(f"batch_size={self.batch_size}, must be >= 1.")

    @property
    def max_budget(self) -> int:
        return self.budgets[-1]


@dataclass(frozen=True)
class RepetitionResult:
    """Per method (rows, ``METHODS`` order) and budget (columns): estimate and 90% interval.

    ``anytime_lower`` / ``anytime_upper``: (len(ANYTIME_METHODS), max_budget) paths;
    ``gate_pass``: whether a single-look FIXED_TIME gate at the true risk (max_risk = the
    pool's risk, 90% one-sided) said PASS, which is wrong by construction;
    ``seconds``: wall time of the repetition; ``fit_seconds``: time in surrogate fits+scores.
    """

    scenario: str
    repetition: int
    estimate: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    anytime_lower: np.ndarray
    anytime_upper: np.ndarray
    balanced_weight: np.ndarray
    seconds: float
    fit_seconds: float
    gate_pass: np.ndarray | None = None


@dataclass
class _Run:
    """Draw log of one sequential run (one proposal) over the pool."""

    pool_size: int
    order: list[int] = field(default_factory=list)
    probability: list[float] = field(default_factory=list)
    expected_loss: list[float] = field(default_factory=list)
    remaining_expected_loss: list[float] = field(default_factory=list)
    correction_low: list[float] = field(default_factory=list)
    correction_high: list[float] = field(default_factory=list)
    residual_second_moment: list[float] = field(default_factory=list)
    floor: list[float] = field(default_factory=list)
    remaining_count: list[int] = field(default_factory=list)
    sums_at: dict[int, PlugInSums] = field(default_factory=dict)

    def terms(self, losses: np.ndarray, count: int) -> DrawTerms:
        items = np.asarray(self.order[:count], dtype=np.int64)
        zeros = np.zeros(count)
        return DrawTerms(
            probability=np.asarray(self.probability[:count]),
            expected_loss=np.asarray(self.expected_loss[:count]),
            remaining_expected_loss=np.asarray(self.remaining_expected_loss[:count]),
            late_expected_loss=zeros,
            late_count=np.zeros(count, dtype=np.int64),
            in_scope=np.ones(count, dtype=bool),
            status=np.full(count, DRAW_LABELED, dtype=np.int64),
            loss=losses[items].astype(float),
            correction_low=np.asarray(self.correction_low[:count]),
            correction_high=np.asarray(self.correction_high[:count]),
            residual_second_moment=np.asarray(self.residual_second_moment[:count]),
            remaining_count=np.asarray(self.remaining_count[:count]),
        )


def _batches(config: HarnessConfig) -> list[int]:
    """Batch sizes: at most ``batch_size``, cut at every refit point and budget."""
    cuts = sorted({*config.refit_at, *config.budgets} | {config.max_budget})
    sizes: list[int] = []
    done = 0
    for cut in cuts:
        if cut > config.max_budget:
            break
        while done < cut:
            step = min(config.batch_size, cut - done)
            sizes.append(step)
            done += step
    return sizes


def _plug_in_sums(scenario: Scenario, labeled: np.ndarray, scores: SurrogateScores) -> PlugInSums:
    unlabeled = ~labeled
    return PlugInSums(
        scope_size=scenario.pool_size,
        labeled_loss_sum=float(scenario.losses[labeled].sum()),
        unlabeled_expected_loss_sum=float(scores.expected_loss[unlabeled].sum()),
        unlabeled_second_moment_sum=float(scores.residual_second_moment[unlabeled].sum()),
        unlabeled_count=int(np.count_nonzero(unlabeled)),
    )


def _subset(scores: SurrogateScores, idx: np.ndarray) -> SurrogateScores:
    worst = scores.worst_squared_deviation
    return SurrogateScores(
        scores.expected_loss[idx],
        scores.residual_second_moment[idx],
        scores.spread[idx],
        None if worst is None else worst[idx],
    )


def _choose_reliance(
    scenario: Scenario,
    run: _Run,
    scores: SurrogateScores,
    labeled: np.ndarray,
    config: HarnessConfig,
    seed: int,
    validation: ValidationRows | None = None,
) -> Reliance:
    """The core's reliance guard at a refit, from the run's labeled draws scored honestly
    (cross-fitted) and the new surrogate's scores over the remaining candidates."""
    order = np.asarray(run.order, dtype=np.int64)
    honest = cross_fitted_scores(
        scenario.spec,
        scenario.features[order],
        scenario.outputs[order],
        scenario.labels[order],
        seed=seed,
        settings=config.surrogate_settings,
        validation=validation,
    )
    return choose_reliance(
        losses=scenario.losses[order],
        honest=honest,
        probabilities=np.asarray(run.probability),
        remaining_counts=np.asarray(run.remaining_count, dtype=float),
        candidates=_subset(scores, np.flatnonzero(~labeled)),
        loss_bound=scenario.spec.bound,
        minimum_floor=config.floor,
    )


def _sequential_run(
    scenario: Scenario,
    config: HarnessConfig,
    rng: np.random.Generator,
    *,
    proposal: Callable[[SurrogateScores, np.ndarray, int], np.ndarray],
    floor: float,
    surrogate_for: Callable[[int, np.ndarray, _Run], SurrogateScores],
    adapt: bool = False,
    reliance_for: Callable[[], Reliance] | None = None,
) -> _Run:
    """Draw ``max_budget`` items in batches; ``surrogate_for(m, labeled, run)`` gives the
    pool-wide scores current at draw m (fitted on labels before m only). ``adapt``: each
    batch's floor from ``adaptive_floor`` over the draws so far (``floor`` the minimum).
    ``reliance_for()``: the reliance (control variate and floor) in force for the next
    batch, chosen at the last refit; None = full reliance at ``floor``."""
    n = scenario.pool_size
    run = _Run(pool_size=n)
    labeled = np.zeros(n, dtype=bool)
    bound = scenario.spec.bound
    done = 0
    scores = surrogate_for(0, labeled, run)
    for size in _batches(config):
        candidates = np.flatnonzero(~labeled)
        raw_scores = _subset(scores, candidates)
        reliance = reliance_for() if reliance_for is not None else Reliance(floor=floor)
        cand_scores = reliance.apply(raw_scores, loss_bound=bound)
        u = proposal(cand_scores, candidates, done)
        batch_floor = reliance.floor
        if adapt:
            from benchmarks.experiments.adaptive_floor import adaptive_floor

            order = np.asarray(run.order, dtype=np.int64)
            batch_floor = adaptive_floor(
                scenario.losses[order] - np.asarray(run.expected_loss),
                np.asarray(run.probability),
                np.asarray(run.floor),
                np.asarray(run.remaining_count, dtype=float),
                minimum=floor,
            )
        worst = cand_scores.worst_squared_deviation
        batch = draw_batch(
            u,
            cand_scores.expected_loss,
            size,
            floor=batch_floor,
            loss_bound=bound,
            rng=rng,
            max_deviation=None if worst is None else np.sqrt(worst),
        )
        items = candidates[batch.positions]
        run.order.extend(int(i) for i in items)
        run.probability.extend(batch.probabilities.tolist())
        run.floor.extend([batch_floor] * size)
        run.remaining_count.extend(int(c) for c in batch.remaining_counts)
        run.expected_loss.extend(cand_scores.expected_loss[batch.positions].tolist())
        run.remaining_expected_loss.extend(batch.remaining_expected_loss.tolist())
        run.correction_low.extend(batch.correction_low.tolist())
        run.correction_high.extend(batch.correction_high.tolist())
        run.residual_second_moment.extend(
            cand_scores.residual_second_moment[batch.positions].tolist()
        )
        labeled[items] = True
        done += size
        scores = surrogate_for(done, labeled, run)
        if done in config.budgets:
            run.sums_at[done] = _plug_in_sums(
                scenario, labeled, reliance.apply(scores, loss_bound=bound)
            )
    return run


def _iid_row(
    losses: np.ndarray, pool_size: int, budgets: tuple[int, ...], confidence: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    est, lo, hi = (np.empty(len(budgets)) for _ in range(3))
    for b, m in enumerate(budgets):
        sample = losses[:m]
        mean = float(sample.mean())
        # t interval with the finite-population correction (sampling without replacement).
        half = (
            stats.t.ppf(0.5 + confidence / 2, m - 1)
            * sample.std(ddof=1)
            / np.sqrt(m)
            * np.sqrt(max(0.0, 1.0 - m / pool_size))
        )
        est[b], lo[b], hi[b] = mean, mean - half, mean + half
    return est, lo, hi


def _wrong_pass(
    terms: DrawTerms,
    sums: PlugInSums,
    mode: EstimatorMode,
    confidence: float,
    bound: float,
    truth: float,
) -> bool:
    """A single-look FIXED_TIME gate at max_risk = the true risk: PASS is a wrong PASS."""
    decision = check_gate(
        terms,
        sums,
        max_risk=truth,
        confidence=confidence,
        bound=BoundKind.FIXED_TIME,
        mode=mode,
        loss_bound=bound,
    )
    return decision.verdict is Verdict.PASS


def _iid_terms(losses: np.ndarray, pool_size: int, bound: float) -> DrawTerms:
    """Uniform draws without replacement as draw terms with no control variate (h = 0):
    q_m = 1/|U_m|, so the per-draw range of (L - 0)/q is [0, B |U_m|]."""
    count = losses.shape[0]
    remaining = pool_size - np.arange(count)
    zeros = np.zeros(count)
    return DrawTerms(
        probability=1.0 / remaining,
        expected_loss=zeros,
        remaining_expected_loss=zeros,
        late_expected_loss=zeros,
        late_count=np.zeros(count, dtype=np.int64),
        in_scope=np.ones(count, dtype=bool),
        status=np.full(count, DRAW_LABELED, dtype=np.int64),
        loss=losses.astype(float),
        correction_low=zeros,
        correction_high=bound * remaining.astype(float),
        remaining_count=remaining,
    )


def _resolve_rule(name: str | None) -> UsefulnessRule:
    if name is None:
        return _core_usefulness
    from benchmarks.experiments.variants import USEFULNESS_RULES

    if name not in USEFULNESS_RULES:
        raise ValueError(f"usefulness_rule={name!r} is unknown, known: {sorted(USEFULNESS_RULES)}.")
    return USEFULNESS_RULES[name]


def run_repetition(scenario: Scenario, repetition: int, config: HarnessConfig) -> RepetitionResult:
    """Run every method once on ``scenario`` with a generator seeded from the repetition."""
    started = time.perf_counter()
    scenario_key = sum(ord(c) for c in scenario.name)
    rng = np.random.default_rng([config.seed, scenario_key, repetition])
    spec, features, outputs = scenario.spec, scenario.features, scenario.outputs
    losses, labels, n = scenario.losses, scenario.labels, scenario.pool_size
    budgets, conf, bound = config.budgets, config.confidence, spec.bound
    rule = _resolve_rule(config.usefulness_rule)
    fit_seconds = 0.0

    # --- leadline's run, fitting its own surrogate sequence as labels arrive.
    snapshots: dict[int, SurrogateScores] = {}
    current: list[SurrogateScores] = []
    refit_points = set(config.refit_at)
    fit_seed = int(rng.integers(2**31 - 1))

    fitted: dict[int, SurrogateScores] = {}

    def _cold_start_erred_less(m: int, order: list[int]) -> bool:
        # Draws t >= the first refit point: the fit in force at t (fitted[p], p <= t) had
        # not seen item order[t]; compare its squared error with the cold start's.
        points = sorted(p for p in fitted if 0 < p < m)
        if not points:
            return False
        fit_err = cold_err = 0.0
        for t in range(points[0], m):
            p = max(q for q in points if q <= t)
            item = order[t]
            fit_err += float(losses[item] - fitted[p].expected_loss[item]) ** 2
            cold_err += float(losses[item] - fitted[0].expected_loss[item]) ** 2
        return cold_err < fit_err

    reliance_now = [Reliance(floor=config.floor)]
    versions: list[tuple[SurrogateScores, Reliance]] = []
    validation = scenario.validation if config.validation else None
    if config.validation and validation is None:
        raise ValueError(f"scenario {scenario.name!r} has no validation rows.")

    def own_surrogate(m: int, labeled: np.ndarray, run: _Run) -> SurrogateScores:
        nonlocal fit_seconds
        order = run.order
        if m == 0 or m in refit_points:
            t0 = time.perf_counter()
            if m == 0 and validation is None:
                model = cold_start_surrogate(spec)
            else:
                idx = np.asarray(order, dtype=np.int64)
                model = fit_surrogate(
                    spec,
                    features[idx],
                    outputs[idx],
                    labels[idx],
                    version=len(snapshots),
                    seed=fit_seed + m,
                    settings=config.surrogate_settings,
                    validation=validation,
                )
            scores = model.score(features, outputs)
            fit_seconds += time.perf_counter() - t0
            fitted[m] = scores
            if config.cold_start_guard and m > 0 and _cold_start_erred_less(m, order):
                scores = fitted[0]
            reliance = Reliance(floor=config.floor)
            if config.guard and m > 0:
                t0 = time.perf_counter()
                reliance = _choose_reliance(
                    scenario, run, scores, labeled, config, fit_seed + m, validation
                )
                fit_seconds += time.perf_counter() - t0
            # With refit_lag k the draws keep the version fitted k refits earlier: refits
            # that finish after the next labels arrive (the draws stay predictable).
            versions.append((scores, reliance))
            scores, reliance_now[0] = versions[max(0, len(versions) - 1 - config.refit_lag)]
            snapshots[m] = scores
            current[:] = [scores]
        return current[0]

    def rule_on_pool(scores: SurrogateScores, candidates: np.ndarray, done: int) -> np.ndarray:
        # The surrogate in force was fitted on the labels up to the last refit point.
        fitted_on = max((p for p in refit_points if p <= done), default=0)
        context = RuleContext(features[candidates], outputs[candidates], spec, fitted_on)
        return rule(scores, context)

    lead = _sequential_run(
        scenario,
        config,
        rng,
        proposal=rule_on_pool,
        floor=config.floor,
        surrogate_for=own_surrogate,
        adapt=config.adaptive_floor,
        reliance_for=lambda: reliance_now[0],
    )
    snapshot_points = sorted(snapshots)

    def shared_surrogate(m: int, _labeled: np.ndarray, _run: _Run) -> SurrogateScores:
        # The latest snapshot fitted at or before m (on leadline's labels, not this run's).
        return snapshots[max(p for p in snapshot_points if p <= m)]

    runs: dict[str, _Run] = {"leadline": lead}
    if config.with_baselines:
        runs["lure"] = _sequential_run(
            scenario,
            config,
            rng,
            proposal=lambda s, _c, _done: s.expected_loss,
            floor=config.floor,
            surrogate_for=shared_surrogate,
        )

        def oracle_proposal(s: SurrogateScores, c: np.ndarray, _done: int) -> np.ndarray:
            return np.abs(losses[c] - s.expected_loss)

        runs["oracle"] = _sequential_run(
            scenario,
            config,
            rng,
            proposal=oracle_proposal,
            floor=config.floor,
            surrogate_for=shared_surrogate,
        )
        runs["gate"] = _sequential_run(
            scenario,
            config,
            rng,
            proposal=rule_on_pool,
            floor=config.gate_floor,
            surrogate_for=shared_surrogate,
            adapt=config.adaptive_floor,
        )

    shape = (len(METHODS), len(budgets))
    est, lo, hi = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    gate_pass = np.full(shape, np.nan)
    truth = float(scenario.true_risk)
    balanced_weight = np.full(len(budgets), np.nan)
    row = {name: i for i, name in enumerate(METHODS)}

    # Its own stream: the i.i.d. baseline is the same whatever the other runs consumed,
    # so arms of an experiment are compared against identical baseline draws.
    iid_rng = np.random.default_rng([config.seed, scenario_key, repetition, 1])
    iid_items = iid_rng.permutation(n)[: config.max_budget]
    iid_losses = losses[iid_items]
    est[row["iid"]], lo[row["iid"]], hi[row["iid"]] = _iid_row(iid_losses, n, budgets, conf)
    # One-sided at conf: the two-sided interval at 2 conf - 1 has the same upper edge.
    gate_pass[row["iid"]] = _iid_row(iid_losses, n, budgets, 2 * conf - 1)[2] < truth

    for b, m in enumerate(budgets):
        terms = lead.terms(losses, m)
        sums = lead.sums_at[m]
        for mode, name in (
            (EstimatorMode.UNBIASED, "unbiased"),
            (EstimatorMode.BALANCED, "balanced"),
            (EstimatorMode.SURROGATE, "surrogate"),
        ):
            r = estimate_risk(terms, sums, mode=mode, confidence=conf, loss_bound=bound)
            est[row[name], b], lo[row[name], b], hi[row[name], b] = r.risk, r.lower, r.upper
            if name == "balanced":
                balanced_weight[b] = r.unbiased_weight
            gate_pass[row[name], b] = _wrong_pass(terms, sums, mode, conf, bound, truth)
        if not config.with_baselines:
            continue
        for name in ("oracle", "gate"):
            r = estimate_risk(
                runs[name].terms(losses, m),
                runs[name].sums_at[m],
                mode=EstimatorMode.UNBIASED,
                confidence=conf,
                loss_bound=bound,
            )
            est[row[name], b], lo[row[name], b], hi[row[name], b] = r.risk, r.lower, r.upper
            gate_pass[row[name], b] = _wrong_pass(
                runs[name].terms(losses, m),
                runs[name].sums_at[m],
                EstimatorMode.UNBIASED,
                conf,
                bound,
                truth,
            )
        lure = runs["lure"]
        weights = lure_weights(np.asarray(lure.probability[:m]), n)
        weighted = weights * losses[np.asarray(lure.order[:m], dtype=np.int64)]
        centre = float(weighted.mean())
        half = stats.norm.ppf(0.5 + conf / 2) * weighted.std(ddof=1) / np.sqrt(m)
        est[row["lure"], b], lo[row["lure"], b], hi[row["lure"], b] = (
            centre,
            centre - half,
            centre + half,
        )
        one_sided = stats.norm.ppf(conf) * weighted.std(ddof=1) / np.sqrt(m)
        gate_pass[row["lure"], b] = centre + one_sided < truth

    path_len = config.max_budget
    any_lo = np.full((len(ANYTIME_METHODS), path_len), np.nan)
    any_hi = np.full((len(ANYTIME_METHODS), path_len), np.nan)
    anytime_terms = {
        "unbiased": lead.terms(losses, path_len),
        "iid": _iid_terms(iid_losses, n, bound),
    }
    if config.with_baselines:
        anytime_terms["gate"] = runs["gate"].terms(losses, path_len)
    for k, name in enumerate(ANYTIME_METHODS):
        if name in anytime_terms:
            lower, upper = anytime_path(anytime_terms[name], n, confidence=conf, loss_bound=bound)
            any_lo[k], any_hi[k] = lower, upper

    return RepetitionResult(
        scenario=scenario.name,
        repetition=repetition,
        estimate=est,
        lower=lo,
        upper=hi,
        anytime_lower=any_lo,
        anytime_upper=any_hi,
        balanced_weight=balanced_weight,
        seconds=time.perf_counter() - started,
        fit_seconds=fit_seconds,
        gate_pass=gate_pass,
    )
