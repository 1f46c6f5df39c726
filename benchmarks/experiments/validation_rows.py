"""How the surrogate should weigh validation rows against pool labels (exact one-draw cost).

Each benchmark scenario carries its validation rows (``Scenario.validation``): the main
model's out-of-fold outputs (``sklearn.model_selection.cross_val_predict``, 5 folds) on the
scenario's training part, rows from outside the pool, as a team would upload them.
For pool-label sets drawn uniformly (several sizes and seeds) each arm fits the core's
surrogate and the table gives the exact one-draw variance of the importance-weighted
difference term under the core's hedged usefulness, relative to one uniform draw (the
formula of ``exact_variance.py``; "Monte Carlo theory, methods and examples", 2013, §9.1).
Below 1 beats i.i.d. sampling. A second table gives the plug-in's squared bias,
(mean g - R)^2, relative to i.i.d. sampling's variance at 100 labels (var(L) / 100): how
much room BALANCED has.

Arms (``SurrogateSettings`` fields, see ``arms``): pool labels only (the fit without
validation rows), the core's defaults, every validation row weighing as much as a pool
label, smaller total validation weights in the trees, and the temperature fitted on the
validation rows only or on the pool labels as soon as there are any.

    .venv/bin/python benchmarks/experiments/validation_rows.py
    .venv/bin/python benchmarks/experiments/validation_rows.py --scenarios digits_weak_tree
    .venv/bin/python benchmarks/experiments/validation_rows.py --timing-only

The fit-time check (also appended to every run): a fit given 100,000 validation rows
(synthetic, 10 classes, 32 features) and 1,000 pool labels, at several caps
(``max_validation_rows``), against the fit on the pool labels alone.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import sys
import time
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

_ROOT = Path(__file__).resolve().parents[2]
if str(_ROOT) not in sys.path:
    sys.path.insert(0, str(_ROOT))

import numpy as np  # noqa: E402

from benchmarks.experiments.exact_variance import one_draw_cost  # noqa: E402
from benchmarks.labels import surrogate_settings  # noqa: E402
from benchmarks.scenarios import SCENARIO_NAMES, build_scenario  # noqa: E402
from leadline.service.estimation import (  # noqa: E402
    DEFAULT_FLOOR,
    LossKind,
    LossSpec,
    SurrogateSettings,
    ValidationRows,
    cold_start_surrogate,
    fit_surrogate,
    usefulness,
)

_OUT = Path(__file__).resolve().parent / "VALIDATION_ROWS.md"


def arms(base: SurrogateSettings) -> dict[str, SurrogateSettings | None]:
    """Arm name -> settings (None: pool labels only, no validation rows). ``core`` is the
    core's defaults (trees: validation rows share a total weight of 3,000; temperature:
    100); each other arm changes one of the two weights."""
    return {
        "pool_only": None,
        "core": base,
        "equal": replace(base, validation_weight=math.inf, temperature_validation_weight=math.inf),
        "trees_1000": replace(base, validation_weight=1000.0),
        "trees_300": replace(base, validation_weight=300.0),
        "trees_100": replace(base, validation_weight=100.0),
        "temperature_validation_only": replace(base, temperature_validation_weight=1e9),
        "temperature_pool_first": replace(base, temperature_validation_weight=1e-6),
    }


def fit_seconds(caps: Sequence[int] = (5_000, 10_000, 20_000)) -> list[tuple[str, float]]:
    """Seconds of one fit (one thread) given 100,000 validation rows, per cap."""
    rng = np.random.default_rng(0)
    classes, width = 10, 32

    def rows(n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        x = rng.normal(size=(n, width))
        logits = x[:, :classes] + rng.normal(size=(n, classes))
        p = np.exp(logits)
        p /= p.sum(axis=1, keepdims=True)
        y = (p.cumsum(axis=1) > rng.random((n, 1))).argmax(axis=1)
        return x, p, y

    spec = LossSpec(kind=LossKind.ZERO_ONE, num_classes=classes)
    xv, pv, yv = rows(100_000)
    xp, pp, yp = rows(1_000)
    validation = ValidationRows(features=xv, outputs=pv, labels=yv)
    times = []
    started = time.perf_counter()
    fit_surrogate(spec, xp, pp, yp, version=1, seed=0, settings=surrogate_settings())
    times.append(("1,000 pool labels only", time.perf_counter() - started))
    for cap in caps:
        settings = replace(surrogate_settings(), max_validation_rows=cap)
        started = time.perf_counter()
        fit_surrogate(spec, xp, pp, yp, version=1, seed=0, settings=settings, validation=validation)
        times.append((f"+ 100,000 validation rows, cap {cap:,}", time.perf_counter() - started))
    return times


def _timing_text(times: list[tuple[str, float]]) -> str:
    lines = "; ".join(f"{what}: {seconds:.2f} s" for what, seconds in times)
    return (
        "Fit time, 10 classes, 32 features, one thread (synthetic rows; the default cap is "
        f"{SurrogateSettings().max_validation_rows:,}): {lines}.\n"
    )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenarios", nargs="+", choices=SCENARIO_NAMES, default=None)
    parser.add_argument("--arms", nargs="+", default=None)
    parser.add_argument("--label-counts", nargs="+", type=int, default=[0, 30, 100, 300])
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument(
        "--timing-only",
        action="store_true",
        help="only the fit-time check, appended to the existing VALIDATION_ROWS.md",
    )
    args = parser.parse_args(argv)
    if args.timing_only:
        text = _timing_text(fit_seconds())
        previous = _OUT.read_text() if _OUT.exists() else ""
        _OUT.write_text(previous + "\n" + text)
        print(text)
        return 0
    started = time.perf_counter()
    all_arms = arms(surrogate_settings())
    chosen = {k: v for k, v in all_arms.items() if args.arms is None or k in args.arms}
    names = list(args.scenarios or SCENARIO_NAMES)
    # cost[arm][m][scenario], bias[arm][m][scenario]: means over seeds
    cost: dict[str, dict[int, dict[str, float]]] = {a: {} for a in chosen}
    bias: dict[str, dict[int, dict[str, float]]] = {a: {} for a in chosen}
    seconds: dict[str, list[float]] = {a: [] for a in chosen}
    for name in names:
        scenario = build_scenario(name, quick=False)
        validation = scenario.validation
        assert validation is not None
        d = scenario.features.shape[1]
        iid_variance_100 = float(scenario.losses.var()) / 100
        for m in args.label_counts:
            per_arm_cost: dict[str, list[float]] = {a: [] for a in chosen}
            per_arm_bias: dict[str, list[float]] = {a: [] for a in chosen}
            if m > scenario.pool_size // 2:
                continue  # most of the pool labeled: nothing left worth measuring
            for seed in range(args.seeds):
                rng = np.random.default_rng([seed, m])
                idx = rng.choice(scenario.pool_size, size=m, replace=False)
                for arm, settings in chosen.items():
                    if settings is None and m == 0:
                        model = cold_start_surrogate(scenario.spec)
                    else:
                        fit_started = time.perf_counter()
                        model = fit_surrogate(
                            scenario.spec,
                            scenario.features[idx].reshape(m, d),
                            scenario.outputs[idx],
                            scenario.labels[idx],
                            version=1,
                            seed=seed,
                            settings=settings or surrogate_settings(),
                            validation=None if settings is None else validation,
                        )
                        seconds[arm].append(time.perf_counter() - fit_started)
                    scores = model.score(scenario.features, scenario.outputs)
                    u = usefulness(scores, loss_bound=scenario.spec.bound)
                    per_arm_cost[arm].append(
                        one_draw_cost(scenario.losses, scores.expected_loss, u, DEFAULT_FLOOR)
                    )
                    plug_in = float(scores.expected_loss.mean())
                    per_arm_bias[arm].append((plug_in - scenario.true_risk) ** 2 / iid_variance_100)
            for arm in chosen:
                if not per_arm_cost[arm]:
                    continue
                cost[arm].setdefault(m, {})[name] = float(np.mean(per_arm_cost[arm]))
                bias[arm].setdefault(m, {})[name] = float(np.mean(per_arm_bias[arm]))
        print(f"{name} done ({time.perf_counter() - started:.0f} s)", flush=True)
    text = _tables(cost, bias, seconds, names, args, started, argv)
    text += "\n" + _timing_text(fit_seconds())
    _OUT.write_text(text)
    print(text)
    return 0


def _tables(
    cost: dict[str, dict[int, dict[str, float]]],
    bias: dict[str, dict[int, dict[str, float]]],
    seconds: dict[str, list[float]],
    names: list[str],
    args: argparse.Namespace,
    started: float,
    argv: Sequence[str] | None,
) -> str:
    def table(values: dict[str, dict[int, dict[str, float]]]) -> list[str]:
        header = ["arm", "pool labels"] + names + ["median", "worst"]
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        for m in args.label_counts:
            for arm, per_m in values.items():
                if m not in per_m:
                    continue
                per = per_m[m]
                row = [arm, str(m)] + [f"{per[n]:.2f}" if n in per else "-" for n in names]
                row += [f"{np.median(list(per.values())):.2f}", f"{max(per.values()):.2f}"]
                lines.append("| " + " | ".join(row) + " |")
        return lines

    now = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    command = "python benchmarks/experiments/validation_rows.py " + " ".join(
        sys.argv[1:] if argv is None else argv
    )
    timing = ", ".join(
        f"{arm} {np.mean(values):.2f} s" for arm, values in seconds.items() if values
    )
    return (
        f"Generated by `{command.strip()}` on {now} "
        f"({(time.perf_counter() - started) / 60:.1f} minutes). Pool labels drawn uniformly "
        f"({args.seeds} seeds per size; 0 = none), validation rows = out-of-fold outputs on "
        "each scenario's training part, full-size pools, floor "
        f"{DEFAULT_FLOOR}, the core's hedged usefulness.\n\n"
        "One-draw variance of the difference term relative to one uniform draw (below 1 "
        "beats i.i.d. sampling):\n\n"
        + "\n".join(table(cost))
        + "\n\nPlug-in squared bias (mean g - R)^2 relative to i.i.d. sampling's variance at "
        "100 labels:\n\n"
        + "\n".join(table(bias))
        + f"\n\nMean fit time per arm (one thread): {timing}.\n"
    )


if __name__ == "__main__":
    raise SystemExit(main())
