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
  the draw index the server draws with) with its own refit surrogate; the three estimator modes of
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

Every run draws, logs and builds its terms through the service's own ledger
(``leadline.service.engine.ledger``: ``build_index`` / ``select_from`` as the server
draws, ``select`` for the other proposals, ``DrawLedger.record`` / ``label``,
``DrawLedger.terms`` / ``plug_in_sums``), and leadline's run chooses its reliance with the
refit's own function (``choose_reliance_at_refit``), so the benchmark measures the code
the server runs. Only the proposal differs between runs (``Proposal``).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from benchmarks.scenarios import Scenario
from leadline.service.engine.ledger import DrawLedger, build_index, select, select_from
from leadline.service.engine.refit import choose_reliance_at_refit
from leadline.service.estimation import (
    DEFAULT_FLOOR,
    DRAW_LABELED,
    BoundKind,
    DrawIndex,
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
    cold_start_surrogate,
    estimate_risk,
    fit_surrogate,
    lure_weights,
)

__all__ = [
    "ANYTIME_METHODS",
    "METHODS",
    "HarnessConfig",
    "RepetitionResult",
    "RuleContext",
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
"""(scores over the candidates, their context) -> usefulness >= 0: an experiment's
replacement for the service's rule (``benchmarks/experiments/variants.py``)."""

Proposal = Callable[[SurrogateScores, np.ndarray, int], np.ndarray]
"""(candidates' scores seen through h, candidate rows, draws so far) -> usefulness."""


@dataclass(frozen=True, kw_only=True)
class HarnessConfig:
    """Everything a repetition needs besides the scenario. Picklable (sent to workers)."""

    budgets: tuple[int, ...] = (10, 25, 50, 100, 200)
    batch_size: int = 10
    refit_at: tuple[int, ...] = (10, 25, 50, 100)
    floor: float = DEFAULT_FLOOR
    gate_floor: float = 0.85
    # leadline's runs choose each batch's control variate and floor with the refit's
    # reliance guard (``choose_reliance_at_refit``); False = full reliance on the surrogate.
    guard: bool = True
    # Teach the surrogate with the scenario's validation rows (out-of-fold outputs on its
    # training part) from the first draw on.
    validation: bool = False
    # Refits that land late: the draws use the surrogate fitted this many refit points
    # earlier (0 = every refit is in force for the next draw).
    refit_lag: int = 0
    confidence: float = 0.9
    anytime_from: int = 10
    seed: int = 20261202
    surrogate_settings: SurrogateSettings = field(default_factory=SurrogateSettings)
    # The strategy hook of the selection experiments: a module-level (picklable) rule that
    # replaces the service's usefulness in leadline's and the gate's runs; None = the
    # service's own (``benchmarks/experiments/variants.py`` holds the candidates).
    usefulness: UsefulnessRule | None = None
    # Which proposals to run besides leadline's (experiments skip the others to save time).
    with_baselines: bool = True
    # leadline's draws through the draw index, as the server makes them (False: through
    # ``select``'s whole-candidate pass, the path before the index; same draws, exact
    # instead of conservative correction ranges; benchmarks/draws.py compares them).
    draw_index: bool = True

    def __post_init__(self) -> None:
        if not self.budgets or list(self.budgets) != sorted(set(self.budgets)):
            raise ValueError(f"budgets = {self.budgets}: must be strictly increasing, non-empty.")
        if self.budgets[0] < 2:
            raise ValueError(f"budgets[0] = {self.budgets[0]}: must be >= 2 (interval needs 2).")
        if self.batch_size < 1:
            raise ValueError(f"batch_size = {self.batch_size}: must be >= 1.")

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


class _Run:
    """One sequential run (one proposal) over the pool, logged in the service's ledger;
    every drawn item is labeled at once with its true loss."""

    def __init__(self, scenario: Scenario, *, draw_index: bool = True) -> None:
        self.scenario = scenario
        self.draw_index = draw_index
        self.ledger = DrawLedger()
        self.labeled = np.zeros(scenario.pool_size, dtype=bool)
        self.sums_at: dict[int, PlugInSums] = {}
        self._terms: DrawTerms | None = None
        # The service's draw index, for the scores and control variate it was built with.
        self._index: DrawIndex | None = None
        self._index_for: tuple[SurrogateScores, float, float] | None = None

    def draw(
        self,
        scores: SurrogateScores,
        size: int,
        *,
        reliance: Reliance,
        rng: np.random.Generator,
        proposal: Proposal | None,
        done: int,
        version: int,
    ) -> None:
        """``size`` draws among the unlabeled items: the service's selection, then labels."""
        scenario = self.scenario
        if proposal is None and self.draw_index:
            # The service's path: the pool's draw index, built once per surrogate and
            # control variate (as at a refit); the drawn items leave it. Same draws as
            # ``select`` over the unlabeled items on the same generator.
            built_for = (scores, reliance.coefficient, reliance.constant)
            if (
                self._index is None
                or self._index_for is None
                or self._index_for[0] is not scores
                or self._index_for[1:] != built_for[1:]
            ):
                self._index = build_index(
                    scores,
                    reliance=reliance,
                    loss_bound=scenario.spec.bound,
                    present=~self.labeled,
                )
                self._index_for = built_for
            selection = select_from(
                self._index,
                size,
                reliance=reliance,
                loss_bound=scenario.spec.bound,
                rng=rng,
                scores_at=lambda rows: _subset(scores, rows),
            )
            rows = selection.positions
        else:
            candidates = np.flatnonzero(~self.labeled)
            rule = None if proposal is None else _rule(proposal, candidates, done)
            selection = select(
                _subset(scores, candidates),
                size,
                reliance=reliance,
                loss_bound=scenario.spec.bound,
                rng=rng,
                rule=rule,
            )
            rows = candidates[selection.positions]
        start = len(self.ledger)
        self.ledger.record(
            selection, rows=rows, surrogate_version=version, arrival_mark=scenario.pool_size
        )
        self.ledger.set_labels(
            np.arange(start, start + size),
            scenario.labels[rows].astype(np.float64),
            scenario.losses[rows].astype(np.float64),
        )
        self.labeled[rows] = True
        self._terms = None

    def plug_in(self, scores: SurrogateScores) -> PlugInSums:
        """The plug-in's sums now, with the surrogate's current scores (as the service)."""
        return self.ledger.plug_in_sums(
            unlabeled=~self.labeled,
            expected_loss=scores.expected_loss,
            second_moment=scores.residual_second_moment,
        )

    def terms(self, count: int) -> DrawTerms:
        """The whole-pool terms of the first ``count`` draws (a valid design by itself)."""
        if self._terms is None:
            n = self.scenario.pool_size
            self._terms = self.ledger.terms(
                item_count=n, cold_expected_loss=np.zeros(n), loss_bound=self.scenario.spec.bound
            )
        return self._terms.first(count)

    @property
    def rows(self) -> np.ndarray:
        return self.ledger.row.view


def _rule(
    proposal: Proposal, candidates: np.ndarray, done: int
) -> Callable[[SurrogateScores], np.ndarray]:
    return lambda seen: proposal(seen, candidates, done)


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


def _subset(scores: SurrogateScores, idx: np.ndarray) -> SurrogateScores:
    worst = scores.worst_squared_deviation
    return SurrogateScores(
        scores.expected_loss[idx],
        scores.residual_second_moment[idx],
        scores.spread[idx],
        None if worst is None else worst[idx],
    )


class _OwnSurrogates:
    """leadline's surrogate sequence: refit on the run's own labels at the refit points
    (the core's ``fit_surrogate``), each fit followed by the refit's reliance choice."""

    def __init__(self, scenario: Scenario, config: HarnessConfig, fit_seed: int) -> None:
        self.scenario = scenario
        self.config = config
        self.fit_seed = fit_seed
        self.validation: ValidationRows | None = scenario.validation if config.validation else None
        if config.validation and self.validation is None:
            raise ValueError(f"scenario {scenario.name!r} has no validation rows.")
        self.snapshots: dict[int, SurrogateScores] = {}
        # Every version fitted so far with its reliance (for ``refit_lag``).
        self.versions: list[tuple[SurrogateScores, Reliance]] = []
        self.reliance = Reliance(floor=config.floor)
        self.fit_seconds = 0.0
        self._current: SurrogateScores | None = None

    def at(self, m: int, run: _Run) -> SurrogateScores:
        """The scores in force for draw m (fitted on the labels of draws before m)."""
        if m == 0 or m in self.config.refit_at:
            self._refit(m, run)
        assert self._current is not None
        return self._current

    def _refit(self, m: int, run: _Run) -> None:
        scenario, config = self.scenario, self.config
        started = time.perf_counter()
        rows = run.rows
        if m == 0 and self.validation is None:
            model = cold_start_surrogate(scenario.spec)
        else:
            model = fit_surrogate(
                scenario.spec,
                scenario.features[rows],
                scenario.outputs[rows],
                scenario.labels[rows],
                version=len(self.snapshots),
                seed=self.fit_seed + m,
                settings=config.surrogate_settings,
                validation=self.validation,
            )
        scores = model.score(scenario.features, scenario.outputs)
        reliance = Reliance(floor=config.floor)
        if config.guard and m > 0:
            ledger = run.ledger
            labeled = ledger.labeled
            reliance = choose_reliance_at_refit(
                scenario.spec,
                scenario.features[rows],
                scenario.outputs[rows],
                scenario.labels[rows],
                losses=ledger.loss.view[labeled],
                probabilities=ledger.probability.view[labeled],
                remaining_counts=ledger.remaining_count.view[labeled].astype(np.float64),
                candidates=_subset(scores, np.flatnonzero(~run.labeled)),
                floor=config.floor,
                seed=self.fit_seed + m,
                settings=config.surrogate_settings,
                validation=self.validation,
            )
        # With refit_lag k the draws keep the version fitted k refits earlier: refits that
        # finish after the next labels arrive (the draws stay predictable).
        self.versions.append((scores, reliance))
        scores, self.reliance = self.versions[max(0, len(self.versions) - 1 - config.refit_lag)]
        self.snapshots[m] = self._current = scores
        self.fit_seconds += time.perf_counter() - started

    def shared(self, m: int) -> SurrogateScores:
        """For the other runs: the latest snapshot fitted at or before m (on leadline's
        labels, not theirs)."""
        return self.snapshots[max(p for p in self.snapshots if p <= m)]


def _sequential_run(
    scenario: Scenario,
    config: HarnessConfig,
    rng: np.random.Generator,
    *,
    surrogate_for: Callable[[int, _Run], SurrogateScores],
    reliance_for: Callable[[], Reliance],
    proposal: Proposal | None,
) -> _Run:
    """Draw ``max_budget`` items in batches; ``surrogate_for(m, run)`` gives the pool-wide
    scores current at draw m (fitted on labels before m only), ``reliance_for()`` the
    reliance (control variate and floor) in force for the next batch. ``proposal`` None
    is the service's usefulness."""
    run = _Run(scenario, draw_index=config.draw_index)
    done = 0
    version = 0
    scores = surrogate_for(0, run)
    for size in _batches(config):
        run.draw(
            scores,
            size,
            reliance=reliance_for(),
            rng=rng,
            proposal=proposal,
            done=done,
            version=version,
        )
        done += size
        if done in config.refit_at:
            version += 1
        scores = surrogate_for(done, run)
        if done in config.budgets:
            run.sums_at[done] = run.plug_in(scores)
    return run


def _leadline_proposal(scenario: Scenario, config: HarnessConfig) -> Proposal | None:
    """The experiment's rule in the context it needs, or None (the service's rule)."""
    rule = config.usefulness
    if rule is None:
        return None
    refit_points = sorted(config.refit_at)

    def proposal(scores: SurrogateScores, candidates: np.ndarray, done: int) -> np.ndarray:
        # The surrogate in force was fitted on the labels up to the last refit point.
        fitted_on = max((p for p in refit_points if p <= done), default=0)
        context = RuleContext(
            scenario.features[candidates], scenario.outputs[candidates], scenario.spec, fitted_on
        )
        return rule(scores, context)

    return proposal


def _lure_proposal(scores: SurrogateScores, _candidates: np.ndarray, _done: int) -> np.ndarray:
    # Active testing: q proportional to the surrogate's expected loss.
    return scores.expected_loss


def _oracle_proposal(losses: np.ndarray) -> Proposal:
    def proposal(scores: SurrogateScores, candidates: np.ndarray, _done: int) -> np.ndarray:
        return np.abs(losses[candidates] - scores.expected_loss)

    return proposal


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


class _Table:
    """The repetition's result arrays, filled method by method."""

    def __init__(self, config: HarnessConfig) -> None:
        shape = (len(METHODS), len(config.budgets))
        self.estimate = np.full(shape, np.nan)
        self.lower = np.full(shape, np.nan)
        self.upper = np.full(shape, np.nan)
        self.gate_pass = np.full(shape, np.nan)
        self.balanced_weight = np.full(len(config.budgets), np.nan)
        self.anytime_lower = np.full((len(ANYTIME_METHODS), config.max_budget), np.nan)
        self.anytime_upper = np.full((len(ANYTIME_METHODS), config.max_budget), np.nan)

    def put(self, method: str, b: int, risk: float, lower: float, upper: float) -> None:
        row = METHODS.index(method)
        self.estimate[row, b], self.lower[row, b], self.upper[row, b] = risk, lower, upper

    def path(
        self, method: str, terms: DrawTerms, n: int, *, confidence: float, bound: float
    ) -> None:
        k = ANYTIME_METHODS.index(method)
        lower, upper = anytime_path(terms, n, confidence=confidence, loss_bound=bound)
        self.anytime_lower[k], self.anytime_upper[k] = lower, upper


def _iid_method(
    table: _Table, scenario: Scenario, config: HarnessConfig, rng: np.random.Generator
) -> None:
    """Uniform random sampling: sample mean and t interval; its anytime path."""
    n, conf, bound = scenario.pool_size, config.confidence, scenario.spec.bound
    losses = scenario.losses[rng.permutation(n)[: config.max_budget]]
    est, lo, hi = _iid_row(losses, n, config.budgets, conf)
    row = METHODS.index("iid")
    table.estimate[row], table.lower[row], table.upper[row] = est, lo, hi
    # One-sided at conf: the two-sided interval at 2 conf - 1 has the same upper edge.
    table.gate_pass[row] = _iid_row(losses, n, config.budgets, 2 * conf - 1)[2] < float(
        scenario.true_risk
    )
    table.path("iid", _iid_terms(losses, n, bound), n, confidence=conf, bound=bound)


def _leadline_methods(table: _Table, run: _Run, scenario: Scenario, config: HarnessConfig) -> None:
    """UNBIASED, BALANCED and SURROGATE on leadline's draws; UNBIASED's anytime path."""
    conf, bound, truth = config.confidence, scenario.spec.bound, float(scenario.true_risk)
    for b, m in enumerate(config.budgets):
        terms, sums = run.terms(m), run.sums_at[m]
        for mode, name in (
            (EstimatorMode.UNBIASED, "unbiased"),
            (EstimatorMode.BALANCED, "balanced"),
            (EstimatorMode.SURROGATE, "surrogate"),
        ):
            r = estimate_risk(terms, sums, mode=mode, confidence=conf, loss_bound=bound)
            table.put(name, b, r.risk, r.lower, r.upper)
            if name == "balanced":
                table.balanced_weight[b] = r.unbiased_weight
            table.gate_pass[METHODS.index(name), b] = _wrong_pass(
                terms, sums, mode, conf, bound, truth
            )
    n = scenario.pool_size
    table.path("unbiased", run.terms(config.max_budget), n, confidence=conf, bound=bound)


def _unbiased_method(
    table: _Table, name: str, run: _Run, scenario: Scenario, config: HarnessConfig
) -> None:
    """UNBIASED on another proposal's draws (oracle, gate)."""
    conf, bound, truth = config.confidence, scenario.spec.bound, float(scenario.true_risk)
    for b, m in enumerate(config.budgets):
        terms, sums = run.terms(m), run.sums_at[m]
        r = estimate_risk(
            terms, sums, mode=EstimatorMode.UNBIASED, confidence=conf, loss_bound=bound
        )
        table.put(name, b, r.risk, r.lower, r.upper)
        table.gate_pass[METHODS.index(name), b] = _wrong_pass(
            terms, sums, EstimatorMode.UNBIASED, conf, bound, truth
        )
    if name in ANYTIME_METHODS:
        table.path(
            name, run.terms(config.max_budget), scenario.pool_size, confidence=conf, bound=bound
        )


def _lure_method(table: _Table, run: _Run, scenario: Scenario, config: HarnessConfig) -> None:
    """LURE weights on the active-testing draws, normal interval (common practice)."""
    conf, n = config.confidence, scenario.pool_size
    row = METHODS.index("lure")
    for b, m in enumerate(config.budgets):
        weights = lure_weights(run.ledger.probability.view[:m], n)
        weighted = weights * scenario.losses[run.rows[:m]]
        centre = float(weighted.mean())
        half = stats.norm.ppf(0.5 + conf / 2) * weighted.std(ddof=1) / np.sqrt(m)
        table.put("lure", b, centre, centre - half, centre + half)
        one_sided = stats.norm.ppf(conf) * weighted.std(ddof=1) / np.sqrt(m)
        table.gate_pass[row, b] = centre + one_sided < float(scenario.true_risk)


def run_repetition(scenario: Scenario, repetition: int, config: HarnessConfig) -> RepetitionResult:
    """Run every method once on ``scenario`` with a generator seeded from the repetition."""
    started = time.perf_counter()
    scenario_key = sum(ord(c) for c in scenario.name)
    rng = np.random.default_rng([config.seed, scenario_key, repetition])
    own = _OwnSurrogates(scenario, config, fit_seed=int(rng.integers(2**31 - 1)))
    proposal = _leadline_proposal(scenario, config)
    lead = _sequential_run(
        scenario,
        config,
        rng,
        surrogate_for=own.at,
        reliance_for=lambda: own.reliance,
        proposal=proposal,
    )
    runs: dict[str, _Run] = {}
    if config.with_baselines:
        shared: Callable[[int, _Run], SurrogateScores] = lambda m, _run: own.shared(m)  # noqa: E731
        full = Reliance(floor=config.floor)
        gate = Reliance(floor=config.gate_floor)
        runs["lure"] = _sequential_run(
            scenario,
            config,
            rng,
            surrogate_for=shared,
            reliance_for=lambda: full,
            proposal=_lure_proposal,
        )
        runs["oracle"] = _sequential_run(
            scenario,
            config,
            rng,
            surrogate_for=shared,
            reliance_for=lambda: full,
            proposal=_oracle_proposal(scenario.losses),
        )
        runs["gate"] = _sequential_run(
            scenario,
            config,
            rng,
            surrogate_for=shared,
            reliance_for=lambda: gate,
            proposal=proposal,
        )

    table = _Table(config)
    # Its own stream: the i.i.d. baseline is the same whatever the other runs consumed,
    # so arms of an experiment are compared against identical baseline draws.
    _iid_method(
        table, scenario, config, np.random.default_rng([config.seed, scenario_key, repetition, 1])
    )
    _leadline_methods(table, lead, scenario, config)
    if config.with_baselines:
        _unbiased_method(table, "oracle", runs["oracle"], scenario, config)
        _unbiased_method(table, "gate", runs["gate"], scenario, config)
        _lure_method(table, runs["lure"], scenario, config)

    return RepetitionResult(
        scenario=scenario.name,
        repetition=repetition,
        estimate=table.estimate,
        lower=table.lower,
        upper=table.upper,
        anytime_lower=table.anytime_lower,
        anytime_upper=table.anytime_upper,
        balanced_weight=table.balanced_weight,
        seconds=time.perf_counter() - started,
        fit_seconds=own.fit_seconds,
        gate_pass=table.gate_pass,
    )
