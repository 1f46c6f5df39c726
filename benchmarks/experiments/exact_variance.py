"""Exact one-draw variance of each usefulness rule, without Monte-Carlo noise over draws.

For a surrogate g and a proposal q over the pool, one draw's difference term
d = (L_i - g_i) / (N q_i) has variance sum_j (L_j - g_j)^2 / (N^2 q_j) - (mean(L - g))^2
(the standard importance-sampling variance; "Monte Carlo theory, methods and examples",
2013, §9.1). Divided by the pool variance of L (one uniform draw of the plain mean) it is
the relative labeling cost of UNBIASED with that surrogate, to first order (it ignores the
finite-population correction and the refits between draws).

Heavy-tailed pools (rare confident mistakes under cross-entropy) make the Monte-Carlo
comparison in ``run.py`` noisy at affordable repetition counts; this one is exact given
the surrogate, so it ranks rules reliably. Surrogates are fitted on uniformly drawn label
sets of each size (several seeds) with the core's default settings.

    .venv/bin/python benchmarks/experiments/exact_variance.py
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import time
from collections.abc import Sequence
from pathlib import Path

_ROOT = Path(__file__).resolve().parents[2]
if str(_ROOT) not in sys.path:
    sys.path.insert(0, str(_ROOT))

import numpy as np  # noqa: E402

from benchmarks.experiments.variants import USEFULNESS_RULES  # noqa: E402
from benchmarks.harness import RuleContext  # noqa: E402
from benchmarks.labels import surrogate_settings  # noqa: E402
from benchmarks.scenarios import SCENARIO_NAMES, build_scenario  # noqa: E402
from leadline.service.estimation import (  # noqa: E402
    DEFAULT_FLOOR,
    cold_start_surrogate,
    fit_surrogate,
)

_OUT = Path(__file__).resolve().parent / "EXACT_VARIANCE.md"


def one_draw_cost(
    losses: np.ndarray, expected_loss: np.ndarray, u: np.ndarray, floor: float
) -> float:
    """Var of one importance-weighted difference term / var of one uniform draw of L."""
    n = losses.shape[0]
    total = float(u.sum())
    q = (1.0 - floor) * u / total + floor / n if total > 0 else np.full(n, 1.0 / n)
    residual = losses - expected_loss
    variance = float(np.sum(residual**2 / q) / n**2 - residual.mean() ** 2)
    return variance / float(losses.var())


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rules", nargs="+", choices=list(USEFULNESS_RULES), default=None)
    parser.add_argument("--floors", nargs="+", type=float, default=[DEFAULT_FLOOR])
    parser.add_argument("--label-counts", nargs="+", type=int, default=[0, 10, 25, 50, 100])
    parser.add_argument("--seeds", type=int, default=3)
    args = parser.parse_args(argv)
    rules = args.rules or list(USEFULNESS_RULES)
    started = time.perf_counter()
    settings = surrogate_settings()
    names = list(SCENARIO_NAMES)
    # cost[rule, floor][scenario] = mean over label counts and seeds
    cost: dict[tuple[str, float], dict[str, float]] = {}
    for name in names:
        scenario = build_scenario(name, quick=False)
        values: dict[tuple[str, float], list[float]] = {}
        for m in args.label_counts:
            for seed in range(args.seeds if m else 1):
                rng = np.random.default_rng([seed, m])
                if m == 0:
                    model = cold_start_surrogate(scenario.spec)
                else:
                    idx = rng.choice(scenario.pool_size, size=m, replace=False)
                    model = fit_surrogate(
                        scenario.spec,
                        scenario.features[idx],
                        scenario.outputs[idx],
                        scenario.labels[idx],
                        version=1,
                        seed=seed,
                        settings=settings,
                    )
                scores = model.score(scenario.features, scenario.outputs)
                context = RuleContext(scenario.features, scenario.outputs, scenario.spec, m)
                for rule in rules:
                    u = USEFULNESS_RULES[rule](scores, context)
                    for floor in args.floors:
                        c = one_draw_cost(scenario.losses, scores.expected_loss, u, floor)
                        values.setdefault((rule, floor), []).append(c)
        for key, v in values.items():
            cost.setdefault(key, {})[name] = float(np.mean(v))
        print(f"{name} done ({time.perf_counter() - started:.0f} s)", flush=True)
    header = ["rule", "floor"] + names + ["median", "worst"]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for (rule, floor), per in sorted(cost.items(), key=lambda kv: np.median(list(kv[1].values()))):
        row = [rule, f"{floor:g}"] + [f"{per[n]:.2f}" for n in names]
        row += [f"{np.median(list(per.values())):.2f}", f"{max(per.values()):.2f}"]
        lines.append("| " + " | ".join(row) + " |")
    now = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    command = "python benchmarks/experiments/exact_variance.py " + " ".join(
        sys.argv[1:] if argv is None else argv
    )
    text = (
        f"Generated by `{command.strip()}` on {now} "
        f"({(time.perf_counter() - started) / 60:.1f} minutes). One-draw variance of the "
        "importance-weighted difference term relative to one uniform draw (below 1 beats "
        f"i.i.d. sampling), averaged over surrogates fitted on {args.label_counts} uniformly "
        f"drawn labels ({args.seeds} seeds each; 0 = cold start); full-size pools; sorted "
        "by median.\n\n" + "\n".join(lines) + "\n"
    )
    _OUT.write_text(text)
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
