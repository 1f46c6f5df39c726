"""Label-efficiency benchmark: leadline's selection and estimators against i.i.d. sampling.

Run from the repository root:

    .venv/bin/python benchmarks/labels.py            # full: 6 scenarios, 300 repetitions
    .venv/bin/python benchmarks/labels.py --quick    # CI: 3 scenarios, smaller pools, 30 reps

The full run writes BENCHMARKS.md (repository root); the quick run writes
bench-out/labels-quick.md unless ``--output`` says otherwise. Both print the tables.
Repetitions run in worker processes (``--workers``, default 2); each repetition seeds its
own numpy Generator from (seed, scenario, repetition index), so results do not depend on
the number of workers or the scheduling.
"""

from __future__ import annotations

import argparse
import datetime as dt
import logging
import multiprocessing
import os
import platform
import shlex
import sys
import time
from collections import defaultdict
from collections.abc import Iterator, Sequence
from dataclasses import replace
from pathlib import Path

_ROOT = Path(__file__).resolve().parents[1]
if str(_ROOT) not in sys.path:  # run as a script: make `benchmarks` importable
    sys.path.insert(0, str(_ROOT))

from benchmarks.harness import (  # noqa: E402
    ANYTIME_METHODS,
    METHODS,
    HarnessConfig,
    RepetitionResult,
    run_repetition,
)
from benchmarks.markdown import replace_section  # noqa: E402
from benchmarks.report import (  # noqa: E402
    ScenarioSummary,
    Target,
    evaluate_targets,
    evaluate_validation_targets,
    format_anytime,
    format_table,
    summarize,
)
from benchmarks.scenarios import (  # noqa: E402
    QUICK_SCENARIO_NAMES,
    SCENARIO_NAMES,
    Scenario,
    build_scenario,
)
from leadline.service.estimation import SurrogateSettings  # noqa: E402

__all__ = ["main", "run_benchmark"]

_LOG = logging.getLogger("benchmarks.labels")

SECTION = "label-efficiency"  # marker name of this benchmark's part of BENCHMARKS.md
FULL_REPETITIONS = 300
QUICK_REPETITIONS = 30
_EXPERIMENTS = _ROOT / "benchmarks" / "experiments"
# Included in BENCHMARKS.md when present: the narrative, then the generated tables.
_EXPERIMENT_PARTS = (
    ("What was tried and what won", _EXPERIMENTS / "NOTES.md"),
    ("Monte-Carlo comparison of selection variants", _EXPERIMENTS / "RESULTS.md"),
    ("Exact one-draw variance of selection variants", _EXPERIMENTS / "EXACT_VARIANCE.md"),
    ("Validation rows: how much they weigh", _EXPERIMENTS / "VALIDATION_ROWS.md"),
)

# Worker-process state, set once by the pool initializer.
_WORKER_SCENARIOS: dict[str, Scenario] = {}
_WORKER_CONFIG: HarnessConfig | None = None


def surrogate_settings() -> SurrogateSettings:
    """The core's default surrogate settings, single-threaded (workers run in parallel)."""
    return SurrogateSettings(num_threads=1)


def _init_worker(scenarios: dict[str, Scenario], config: HarnessConfig) -> None:
    # One thread per worker: the parallelism is across repetitions.
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)
    os.environ["OMP_NUM_THREADS"] = "1"
    _WORKER_SCENARIOS.update(scenarios)
    global _WORKER_CONFIG
    _WORKER_CONFIG = config


def _work(task: tuple[str, int]) -> RepetitionResult:
    name, repetition = task
    assert _WORKER_CONFIG is not None
    return run_repetition(_WORKER_SCENARIOS[name], repetition, _WORKER_CONFIG)


def _tasks(names: Sequence[str], repetitions: int) -> list[tuple[str, int]]:
    # Interleave scenarios so slow pools do not all end up at the tail.
    return [(name, rep) for rep in range(repetitions) for name in names]


def run_benchmark(
    scenarios: Sequence[Scenario],
    config: HarnessConfig,
    *,
    repetitions: int,
    workers: int,
    progress: bool = True,
) -> dict[str, list[RepetitionResult]]:
    """Run ``repetitions`` of every scenario; returns results per scenario, in rep order."""
    by_name = {s.name: s for s in scenarios}
    tasks = _tasks(list(by_name), repetitions)
    results: dict[str, list[RepetitionResult]] = defaultdict(list)

    def collect(stream: Iterator[RepetitionResult]) -> None:
        started = time.perf_counter()
        for done, result in enumerate(stream, start=1):
            results[result.scenario].append(result)
            if progress and (done % max(1, len(tasks) // 20) == 0 or done == len(tasks)):
                elapsed = time.perf_counter() - started
                print(
                    f"  {done}/{len(tasks)} repetitions, {elapsed:.0f} s",
                    file=sys.stderr,
                    flush=True,
                )

    if workers <= 1:
        _init_worker(by_name, config)
        collect(_work(t) for t in tasks)
    else:
        # spawn: LightGBM's OpenMP runtime is not fork-safe once used in the parent.
        context = multiprocessing.get_context("spawn")
        with context.Pool(workers, initializer=_init_worker, initargs=(by_name, config)) as pool:
            collect(pool.imap_unordered(_work, tasks, chunksize=2))
    return {name: sorted(rs, key=lambda r: r.repetition) for name, rs in results.items()}


def _targets_markdown(targets: Sequence[Target]) -> str:
    lines = ["| target | measured | met |", "|---|---|---|"]
    lines += [f"| {t.name} | {t.measured} | {'met' if t.met else 'NOT met'} |" for t in targets]
    return "\n".join(lines)


def _summary_table(
    without: Sequence[ScenarioSummary], with_rows: Sequence[ScenarioSummary], budget: int
) -> str:
    """One line per scenario: relative cost at ``budget`` without / with validation items,
    the lowest fixed-time coverage over all budgets and the anytime never-miss rate."""
    by_name = {s.name: s for s in with_rows}
    lines = [
        f"| scenario | BALANCED cost@{budget} | UNBIASED cost@{budget} | lowest fixed-time "
        "coverage (BALANCED) | anytime never-miss | BALANCED cost, with validation items "
        "| UNBIASED cost, with | lowest coverage, with | never-miss, with |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    k = ANYTIME_METHODS.index("unbiased")

    def cells(s: ScenarioSummary | None) -> list[str]:
        if s is None:
            return ["-", "-", "-", "-"]
        low = min(s.at("coverage", "balanced", b) for b in s.budgets)
        return [
            f"{s.at('cost', 'balanced', budget):.2f}",
            f"{s.at('cost', 'unbiased', budget):.2f}",
            f"{low:.3f}",
            f"{s.anytime_never_miss[k]:.3f}",
        ]

    for s in without:
        name = s.name + (" (hard)" if s.hard else "")
        lines.append("| " + " | ".join([name, *cells(s), *cells(by_name.get(s.name))]) + " |")
    return "\n".join(lines)


def _scenario_section(s: ScenarioSummary, title: str) -> list[str]:
    return [
        f"#### {title}",
        "",
        f"{s.repetitions} repetitions, {s.seconds_per_repetition:.2f} s per repetition "
        f"({s.fit_share:.0%} in surrogate fits and scoring). BALANCED's mean weight on "
        "the unbiased part: "
        + ", ".join(f"{w:.2f}@{m}" for m, w in zip(s.budgets, s.balanced_weight, strict=True))
        + ".",
        "",
        format_table(s, markdown=True),
        "",
        format_anytime(s, markdown=True),
        "",
    ]


def _markdown(
    without: Sequence[ScenarioSummary],
    with_rows: Sequence[ScenarioSummary],
    targets: Sequence[Target],
    config: HarnessConfig,
    *,
    command: str,
    quick: bool,
    repetitions: int,
    workers: int,
    wall_seconds: float,
) -> str:
    now = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    cores = os.cpu_count()
    out = [
        "## Label efficiency",
        "",
        f"Generated by `{command}` on {now}; machine: {cores} cores "
        f"({platform.machine()}, Python {platform.python_version()}), {workers} worker "
        f"processes; wall time {wall_seconds / 60:.1f} minutes"
        + (" — QUICK mode: fewer repetitions, 3 scenarios, smaller pools." if quick else "."),
        "",
        f"{repetitions} repetitions per scenario; budgets M = {list(config.budgets)}; one "
        f"sequential run of {config.max_budget} draws per method and repetition, evaluated "
        f"at every budget prefix (a prefix of a sequential design is a valid design). "
        f"Batches of at most {config.batch_size} draws; surrogate refits after "
        f"{list(config.refit_at)} labels, each refit also choosing the reliance guard's "
        f"control variate and floor; minimum floor epsilon = {config.floor} "
        f"(gate-floor run: {config.gate_floor}); intervals at {config.confidence:.0%}. "
        "Each scenario runs without validation items and, where a second table follows, "
        "with its validation rows (the main model's out-of-fold outputs on the scenario's "
        "training part, `cross_val_predict`, 5 folds) teaching every surrogate from the "
        "first draw; the i.i.d. baseline is the same in both.",
        "",
        "Methods: " + "; ".join(_METHOD_NOTES[m] for m in METHODS) + ".",
        "",
        "Relative labeling cost at M = M / (labels i.i.d. sampling needs for the method's "
        "RMSE), interpolated on the i.i.d. baseline's own RMSE curve (log-log); `*` marks "
        "values outside the measured i.i.d. range, extrapolated as RMSE ~ 1/sqrt(M) from "
        f"M = {config.budgets[-1]} (or from M = {config.budgets[0]} below it). Below 1 is "
        "better; at this many repetitions a cost moves by about +-0.1 between runs (more "
        "on heavy-tailed pools). Coverage is over repetitions (Monte-Carlo standard error "
        f"about {(0.9 * 0.1 / repetitions) ** 0.5:.3f} at 90%); the fixed-time interval is "
        "the finite-sample betting interval, so it may over-cover (that shows as width). "
        "`wrong PASS@100`: share of runs in which a single-look FIXED_TIME gate at 90% with "
        "max_risk = the true risk said PASS (allowed: 10%).",
        "",
        "### Targets",
        "",
        _targets_markdown(targets),
        "",
        "### Summary at M = 100",
        "",
        _summary_table(without, with_rows, 100),
        "",
    ]
    by_name = {s.name: s for s in with_rows}
    for s in without:
        out += [
            f"### {s.name}",
            "",
            f"{s.description}. N = {s.pool_size:,}, true risk {s.true_risk:.4f}, loss bound "
            f"B = {s.loss_bound:.3g}.",
            "",
        ]
        out += _scenario_section(s, "Without validation items")
        if s.name in by_name:
            out += _scenario_section(by_name[s.name], "With validation items")
    parts = [(title, path) for title, path in _EXPERIMENT_PARTS if path.exists()]
    if parts:
        out += ["### Experiments", ""]
        for title, path in parts:
            out += [f"#### {title}", "", path.read_text().strip(), ""]
    return "\n".join(out)


_METHOD_NOTES = {
    "iid": "i.i.d. = uniform random sampling without replacement, sample mean, t interval "
    "with finite-population correction",
    "lure": "LURE = active-testing baseline, q proportional to the surrogate's expected loss "
    "(same floor), LURE weights, normal interval",
    "surrogate": "SURROGATE = plug-in on leadline's draws",
    "unbiased": "UNBIASED = leadline's usefulness + draw_batch, difference estimator",
    "balanced": "BALANCED = same draws, data-chosen mix of UNBIASED and SURROGATE",
    "oracle": "oracle = q proportional to |L - g| from the true losses (unattainable), "
    "UNBIASED estimator",
    "gate": "gate floor = leadline's usefulness with the gate floor, UNBIASED estimator "
    "(for the anytime bound)",
}


def _parse(argv: Sequence[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="CI mode: ~3 minutes")
    parser.add_argument("--repetitions", type=int, default=None)
    parser.add_argument("--scenarios", nargs="+", choices=SCENARIO_NAMES, default=None)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seed", type=int, default=HarnessConfig().seed)
    parser.add_argument("--output", type=Path, default=None, help="markdown file to write")
    parser.add_argument("--gate-floor", type=float, default=HarnessConfig().gate_floor)
    parser.add_argument(
        "--no-guard",
        action="store_true",
        help="full reliance on the surrogate (switch off the core's reliance guard)",
    )
    parser.add_argument(
        "--refit-lag",
        type=int,
        default=0,
        help="draws use the surrogate fitted this many refits earlier (refits landing late)",
    )
    parser.add_argument(
        "--validation",
        choices=("both", "with", "without"),
        default="both",
        help="run without validation items, with them (scenarios that are not 'hard'), or "
        "both side by side (default)",
    )
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = _parse(argv)
    logging.basicConfig(level=logging.WARNING)
    started = time.perf_counter()
    quick = bool(args.quick)
    repetitions = args.repetitions or (QUICK_REPETITIONS if quick else FULL_REPETITIONS)
    if repetitions < 2:
        raise SystemExit(f"--repetitions={repetitions}: must be >= 2.")
    names = args.scenarios or (QUICK_SCENARIO_NAMES if quick else SCENARIO_NAMES)
    output = args.output or (
        _ROOT / "bench-out" / "labels-quick.md" if quick else _ROOT / "BENCHMARKS.md"
    )
    config = HarnessConfig(
        seed=args.seed,
        surrogate_settings=surrogate_settings(),
        gate_floor=args.gate_floor,
        guard=not args.no_guard,
        refit_lag=args.refit_lag,
    )
    print(
        f"label-efficiency benchmark ({'QUICK: ' if quick else ''}{len(names)} scenarios, "
        f"{repetitions} repetitions, {args.workers} workers, validation items: "
        f"{args.validation})",
        flush=True,
    )
    scenarios = [build_scenario(n, quick=quick) for n in names]
    without: list[ScenarioSummary] = []
    with_rows: list[ScenarioSummary] = []
    if args.validation in ("both", "without"):
        results = run_benchmark(scenarios, config, repetitions=repetitions, workers=args.workers)
        without = [summarize(s, results[s.name], config) for s in scenarios]
    if args.validation in ("both", "with"):
        taught = [s for s in scenarios if s.validation is not None and not s.hard]
        with_config = replace(config, validation=True)
        results = run_benchmark(taught, with_config, repetitions=repetitions, workers=args.workers)
        with_rows = [summarize(s, results[s.name], with_config) for s in taught]
    wall = time.perf_counter() - started
    targets = evaluate_targets(without or with_rows, wall_seconds=wall, quick=quick)
    if with_rows:
        targets += evaluate_validation_targets(with_rows, without)
    for title, group in (("without validation items", without), ("with", with_rows)):
        for s in group:
            print(f"\n== {s.name} ({title}): N={s.pool_size:,}, risk {s.true_risk:.4f}")
            print(format_table(s, markdown=False))
            print(format_anytime(s, markdown=False))
    print("\nTargets (* cost extrapolated beyond the measured i.i.d. curve):")
    for t in targets:
        print(f"  [{'met' if t.met else 'NOT met'}] {t.name}: {t.measured}")
    command = "python benchmarks/labels.py " + " ".join(
        shlex.quote(a) for a in (sys.argv[1:] if argv is None else argv)
    )
    text = _markdown(
        without or with_rows,
        with_rows if without else [],
        targets,
        config,
        command=command.strip(),
        quick=quick,
        repetitions=repetitions,
        workers=args.workers,
        wall_seconds=wall,
    )
    output.parent.mkdir(parents=True, exist_ok=True)
    if not output.exists():
        output.write_text("# Benchmarks\n")
    # Other benchmarks own other sections of the same file (benchmarks/markdown.py).
    replace_section(output, SECTION, text)
    print(f"\nwrote {output} ({wall / 60:.1f} minutes)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
