"""Compare selection-rule variants on the benchmark scenarios; writes RESULTS.md here.

    .venv/bin/python benchmarks/experiments/run.py --repetitions 100
    .venv/bin/python benchmarks/experiments/run.py --arms core floor_0.3 --repetitions 60

Each arm changes one thing against the core's defaults (usefulness rule, floor epsilon,
refit cadence, surrogate capacity) and runs only leadline's own draws (plus the i.i.d.
baseline for the relative cost). Large pools are the quick-mode sizes to save time; the
main benchmark (``benchmarks/labels.py``) uses the full sizes. ``BENCHMARKS.md`` includes
the RESULTS.md this script writes.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import shlex
import sys
import time
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

_ROOT = Path(__file__).resolve().parents[2]
if str(_ROOT) not in sys.path:
    sys.path.insert(0, str(_ROOT))

import numpy as np  # noqa: E402

from benchmarks.experiments.variants import USEFULNESS_RULES  # noqa: E402
from benchmarks.harness import HarnessConfig  # noqa: E402
from benchmarks.labels import run_benchmark, surrogate_settings  # noqa: E402
from benchmarks.report import ScenarioSummary, summarize  # noqa: E402
from benchmarks.scenarios import SCENARIO_NAMES, build_scenario  # noqa: E402

_RESULTS = Path(__file__).resolve().parent / "RESULTS.md"
_DENSE = (10, 20, 30, 40, 50, 70, 100)
_SPARSE = (10, 50, 100)
_PREVIOUS: list[str] = []  # RESULTS.md as it was before an --append run


def _arms() -> dict[str, dict[str, Any]]:
    base = surrogate_settings()
    return {
        "core": {},
        "sqrt_second_moment": {"usefulness": USEFULNESS_RULES["plain_square_root"]},
        "expected_loss": {"usefulness": USEFULNESS_RULES["expected_loss"]},
        "spread_x3": {"usefulness": USEFULNESS_RULES["spread_x3"]},
        "spread_x10": {"usefulness": USEFULNESS_RULES["spread_x10"]},
        "pow_0.25": {"usefulness": USEFULNESS_RULES["second_moment_pow_0.25"]},
        "pow_0.75": {"usefulness": USEFULNESS_RULES["second_moment_pow_0.75"]},
        "refit_150": {"refit_at": (10, 25, 50, 100, 150)},
        "root_plus_loss": {"usefulness": USEFULNESS_RULES["root_plus_loss"]},
        "smoothed_0.1": {"usefulness": USEFULNESS_RULES["smoothed_0.1"]},
        "smoothed_1": {"usefulness": USEFULNESS_RULES["smoothed_1"]},
        "mixture_0.01": {"usefulness": USEFULNESS_RULES["mixture_0.01"]},
        "mixture_0.03": {"usefulness": USEFULNESS_RULES["mixture_0.03"]},
        "mixture_succession": {"usefulness": USEFULNESS_RULES["mixture_succession"]},
        "mixture_bound_0.01": {"usefulness": USEFULNESS_RULES["mixture_bound_0.01"]},
        "mixture_bound_0.003": {"usefulness": USEFULNESS_RULES["mixture_bound_0.003"]},
        "mixture_0.01_floor_0.2": {"usefulness": USEFULNESS_RULES["mixture_0.01"], "floor": 0.2},
        "mixture_0.01_floor_0.1": {"usefulness": USEFULNESS_RULES["mixture_0.01"], "floor": 0.1},
        "floor_0.1": {"floor": 0.1},
        "floor_0.3": {"floor": 0.3},
        "floor_0.5": {"floor": 0.5},
        "refit_dense": {"refit_at": _DENSE},
        "refit_sparse": {"refit_at": _SPARSE},
        "ensemble_10": {"surrogate_settings": replace(base, ensemble_size=10)},
        "rounds_80": {"surrogate_settings": replace(base, num_rounds=80)},
        "rounds_20": {"surrogate_settings": replace(base, num_rounds=20)},
        "core_pow_0.75": {"usefulness": USEFULNESS_RULES["core_pow_0.75"]},
        "core_pow_0.5": {"usefulness": USEFULNESS_RULES["core_pow_0.5"]},
        "floor_0.2": {"floor": 0.2},
        "floor_0.15": {"floor": 0.15},
    }


def _fmt(x: float) -> str:
    return "n/a" if not np.isfinite(x) else f"{x:.2f}"


def _row(arm: str, summaries: Sequence[ScenarioSummary], budget: int) -> list[str]:
    cells = [arm]
    balanced = [s.at("cost", "balanced", budget) for s in summaries]
    unbiased = [s.at("cost", "unbiased", budget) for s in summaries]
    cells += [f"{_fmt(b)} / {_fmt(u)}" for b, u in zip(balanced, unbiased, strict=True)]
    cells.append(f"{_fmt(float(np.median(balanced)))} / {_fmt(float(np.median(unbiased)))}")
    cells.append(f"{_fmt(max(balanced))} / {_fmt(max(unbiased))}")
    coverage = [
        s.at("coverage", m, b)
        for s in summaries
        for m in ("balanced", "unbiased")
        for b in s.budgets
        if b >= 50
    ]
    cells.append(f"{min(coverage):.3f}")
    return cells


def main(argv: Sequence[str] | None = None) -> int:
    arms = _arms()
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--arms", nargs="+", choices=list(arms), default=list(arms))
    parser.add_argument("--scenarios", nargs="+", choices=SCENARIO_NAMES, default=SCENARIO_NAMES)
    parser.add_argument("--repetitions", type=int, default=100)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--budget", type=int, default=100)
    parser.add_argument("--append", action="store_true", help="add rows to RESULTS.md")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    if args.append and _RESULTS.exists():
        _PREVIOUS.append(_RESULTS.read_text().rstrip())
    scenarios = [build_scenario(n, quick=True) for n in args.scenarios]
    base = HarnessConfig(surrogate_settings=surrogate_settings(), with_baselines=False)
    rows = []
    medians: dict[str, tuple[float, float]] = {}
    for arm in args.arms:
        t0 = time.perf_counter()
        config = replace(base, **arms[arm])
        results = run_benchmark(
            scenarios, config, repetitions=args.repetitions, workers=args.workers, progress=False
        )
        summaries = [summarize(s, results[s.name], config) for s in scenarios]
        rows.append(_row(arm, summaries, args.budget))
        balanced = [s.at("cost", "balanced", args.budget) for s in summaries]
        medians[arm] = (float(np.median(balanced)), float(np.max(balanced)))
        print(" | ".join(rows[-1]), f"({time.perf_counter() - t0:.0f} s)", flush=True)
        _write(rows, medians, scenarios, args, argv, base, started)
    print(f"wrote {_RESULTS}")
    return 0


def _write(
    rows: list[list[str]],
    medians: dict[str, tuple[float, float]],
    scenarios: Sequence[Any],
    args: argparse.Namespace,
    argv: Sequence[str] | None,
    base: HarnessConfig,
    started: float,
) -> None:
    header = ["arm"] + [s.name for s in scenarios] + ["median", "worst", "min coverage M>=50"]
    table = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    table += ["| " + " | ".join(r) + " |" for r in rows]
    now = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    command = "python benchmarks/experiments/run.py " + " ".join(
        shlex.quote(a) for a in (sys.argv[1:] if argv is None else argv)
    )
    intro = (
        f"Generated by `{command.strip()}` on {now} ({os.cpu_count()} cores, "
        f"{(time.perf_counter() - started) / 60:.1f} minutes); {args.repetitions} repetitions "
        f"per arm and scenario, quick-mode pool sizes. Cells: relative labeling cost at "
        f"M = {args.budget}, BALANCED / UNBIASED (below 1 beats i.i.d. sampling). Each arm "
        "changes one setting against `core` (the core's usefulness, floor "
        f"{base.floor}, refits after {list(base.refit_at)} labels, default surrogate)."
    )
    best = min(medians, key=lambda a: medians[a][0])
    safest = min(medians, key=lambda a: medians[a][1])
    verdict = (
        f"Lowest median BALANCED cost: `{best}` ({medians[best][0]:.2f}, worst "
        f"{medians[best][1]:.2f}); lowest worst case: `{safest}` ({medians[safest][1]:.2f})"
    )
    if "core" in medians:
        verdict += f"; `core`: median {medians['core'][0]:.2f}, worst {medians['core'][1]:.2f}"
    text = intro + "\n\n" + "\n".join(table) + "\n\n" + verdict + ".\n"
    if args.append and _PREVIOUS:
        text = _PREVIOUS[0] + "\n\n" + text
    _RESULTS.write_text(text)


if __name__ == "__main__":
    raise SystemExit(main())
